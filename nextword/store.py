"""The model file: building its arrays from counts, writing it atomically, reading it safely.

One file holds everything a query needs, laid out so that opening it is a few header
reads plus ``mmap``: the bigram arrays are never copied or parsed, so load time does not
grow with the model. Every number read from a file is checked before it is used as a
length, offset or index; see docs/FORMAT.md for the byte-by-byte layout.
"""

from __future__ import annotations

import bisect
import mmap
import os
import struct
import tempfile
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Final, Iterable, Sequence, cast

import marisa_trie
import msgpack
import numpy as np

from .codecs import COUNT_ESCAPE as COUNT_ESCAPE  # one source: the codec owns the escape byte
from .codecs import EXACT, Codec, ExactCodec, codec_named
from .succinct import ChunkedEF, PrefixSums, ef_check_headers, ef_encode
from .successors import CTX_BLOCK as CTX_BLOCK  # one source: the plain layout's trigram block (re-exported)
from .successors import (
    BigramLists, EFBigramLists, EFSparseTable, EFTrigramLists, PlainBigramLists, PlainSparseTable, PlainTrigramLists,
    RowCounts, SparseTable, TrigramLists,
)  # fmt: skip
from .counts import CountTables
from .errors import InvalidArgumentError, ModelFormatError
from .estimators import FittedJelinekMercer, FittedKneserNey, unigram_floor
from .estimators.jm import MAX_LAMBDA as MAX_LAMBDA  # re-exported: one source, the estimator that owns λ
from .estimators.jm import jm_step
from .text import TEXT_RULES
from .paths import check_new_output as check_new_output  # re-exported: callers of the store use it

__all__ = [
    "level_values",
    "QUANT_MINOR",
    "COMPACT_MINOR",
    "compact_sections",
    "MAGIC",
    "FORMAT_VERSION",
    "write_model",
    "read_model",
    "rewrite_model",
    "ModelArrays",
    "atomic_write",
    "DEFAULT_SKYBAND_K",
    "DEFAULT_SKYBAND_MIN",
    "DEFAULT_TRIGRAM_SKYBAND_MIN",
    "TOPK_FANOUT",
    "MAX_LAMBDA",
    "build",
    "build_ngram_sections",
    "ESTIMATORS",
    "ORDERS",
]

MAGIC: Final = b"\x89NWM\r\n\x1a\n"
FORMAT_VERSION: Final = (1, 0)
#: Minor version 1 adds λ by history count (META "lambda_buckets"); minor version 2 adds
#: pruned models (optional HIST section: c(v) as the sum of the kept pairs); minor version
#: 3 added the estimator and order fields of META, Kneser-Ney and a first trigram layout;
#: minor version 4 replaces that layout (value codec in META, one-byte trigram values,
#: derived context totals, dropped mass, trigram skybands; docs/FORMAT.md §7.11-7.16).
#: Files that use none of these stay 1.0. 1.3 files are refused with a message naming
#: the version (they were never released; retraining writes 1.4).
MAX_MINOR: Final = 6
#: the layout of Kneser-Ney and trigram files
NGRAM_MINOR: Final = 4
#: the same layout with quantised values (META codec "quant", docs/FORMAT.md §7.17); any
#: estimator and order, the Jelinek-Mercer bigram included (it needs HIST: its row sums
#: are sums of decoded values, no longer the unigram counts)
QUANT_MINOR: Final = 5
#: any 1.4/1.5 kind with its monotone sequences coded by chunked Elias-Fano (META
#: "successors", docs/FORMAT.md §7.18): successor lists, row and trigram starts, and no
#: stored inverse permutations
COMPACT_MINOR: Final = 6
#: META "successors" of a 1.6 file (the only layout so far)
SUCCESSORS_META: Final = {"name": "ef", "version": 1}
#: a trigram context with more successors than this has (Σ values, n₁, n₂, n₃₊) stored in
#: TLNI/TLNV; shorter ones are summed from their row at query time
SUMMARY_MIN: Final = 32
#: the value tags of each level (the codec's sections)
BIGRAM_TAGS: Final = (b"CNTS", b"BIGI", b"BIGC")
TRIGRAM_TAGS: Final = (b"TVAL", b"TBGI", b"TBGC")
#: each bigram entry's number of trigram successors (0: not a trigram context), same escapes
CONTEXT_TAGS: Final = (b"TLEN", b"TLEI", b"TLEV")
#: sections that only some files have: tag -> element type ("id" = the file's id type,
#: "u2|u4" = either, declared in the section table)
_OPTIONAL: Final = {
    b"HIST": "u4",
    b"HN13": "u4",
    b"HDRI": "id",
    b"HDRV": "u4",
    b"TCTB": "u4",
    b"TLEN": "u1",
    b"TLEI": "u4",
    b"TLEV": "u4",
    b"TSUC": "id",
    b"TVAL": "u1",
    b"TBGI": "u4",
    b"TBGC": "u4",
    b"TLNI": "u4",
    b"TLNV": "u4",
    b"TDRI": "u4",
    b"TDRV": "u4",
    b"TSGS": "u4",
    b"TSGE": "u4",
    b"TSKP": "u4",
    b"TSKI": "u2|u4",
    b"TSKC": "u2|u4",
    # format 1.6 (§7.18): chunked Elias-Fano headers (u32 or u64) and bit streams, and HN13's replacement
    b"RWEH": "u4|u8",
    b"RWEB": "u1",
    b"SEFH": "u4|u8",
    b"SEFB": "u1",
    b"TPTH": "u4|u8",
    b"TPTB": "u1",
    b"TEFH": "u4|u8",
    b"TEFB": "u1",
    b"UNEH": "u4|u8",
    b"UNEB": "u1",
    b"HSEH": "u4|u8",
    b"HSEB": "u1",
    b"N1EH": "u4|u8",
    b"N1EB": "u1",
    b"N2EH": "u4|u8",
    b"N2EB": "u1",
    b"HDIH": "u4|u8",
    b"HDIB": "u1",
    b"HDVH": "u4|u8",
    b"HDVB": "u1",
    b"TDIH": "u4|u8",
    b"TDIB": "u1",
    b"TDVH": "u4|u8",
    b"TDVB": "u1",
}
#: the required sections of §7 that a 1.6 file replaces (§7.18), and the sections it has instead
_COMPACT_DROPS: Final = (b"IDTK", b"APOS", b"ROWS", b"SUCC", b"UNIG")
_COMPACT_BASE: Final = (b"RWEH", b"RWEB", b"SEFH", b"SEFB", b"UNEH", b"UNEB")
#: a 1.6 file's optional sections per kind, in place of the plain ones (§7.18)
_COMPACT_NGRAM_BASE: Final = (b"HSEH", b"HSEB", b"HDIH", b"HDIB", b"HDVH", b"HDVB")
_COMPACT_KN: Final = (b"N1EH", b"N1EB", b"N2EH", b"N2EB")
_COMPACT_TRIGRAM: Final = (b"TPTH", b"TPTB", b"TEFH", b"TEFB", b"TDIH", b"TDIB", b"TDVH", b"TDVB")
_PLAIN_TRIGRAM_ONLY: Final = (b"TCTB", b"TLEN", b"TLEI", b"TLEV", b"TSUC", b"TDRI", b"TDRV")
#: smoothing methods and n-gram orders a model file can record (META "estimator", "order")
ESTIMATORS: Final = ("jm", "kn")
ORDERS: Final = (2, 3)
_TRIGRAM: Final = (
    b"TCTB", b"TLEN", b"TLEI", b"TLEV", b"TSUC", b"TVAL", b"TBGI", b"TBGC",
    b"TLNI", b"TLNV", b"TDRI", b"TDRV", b"TSGS", b"TSGE", b"TSKP", b"TSKI", b"TSKC",
)  # fmt: skip
#: in every 1.4 n-gram file: per-history totals (with dropped mass) and the dropped part
_NGRAM_BASE: Final = (b"HIST", b"HDRI", b"HDRV")
HEADER = struct.Struct("<8sHHIQII")  # magic, major, minor, sections, file size, table crc, header crc
ENTRY = struct.Struct("<4sB3xQQI4x")  # tag, dtype code, offset, length, crc
MAX_SECTIONS: Final = 64
MAX_META_BYTES: Final = 1 << 20
ALIGN: Final = 8

#: A row segment (the successors sharing a prefix) with more entries than this gets a
#: stored skyband, so a query never scores more candidates than about this many.
DEFAULT_SKYBAND_MIN: Final = 64
#: The same threshold for the trigram rows' segments (§7.16), lower: a trigram segment
#: of a few dozen entries would otherwise be cut with numpy on every query that meets it,
#: while its band costs about 30 bytes. A file records the value it used
#: (META ``trigram_skyband_min``); a smaller ``skyband_min`` lowers it too.
DEFAULT_TRIGRAM_SKYBAND_MIN: Final = 24
#: Queries with k up to this use the stored skybands (larger k scan the segment).
DEFAULT_SKYBAND_K: Final = 8
#: Branching of the multi-level top lists used for prefix queries (see docs/FORMAT.md).
TOPK_FANOUT: Final = 64

_DTYPES: Final = {0: None, 1: np.dtype("<u1"), 2: np.dtype("<u2"), 3: np.dtype("<u4"), 4: np.dtype("<u8")}
_CODES: Final = {np.dtype("<u1"): 1, np.dtype("<u2"): 2, np.dtype("<u4"): 3, np.dtype("<u8"): 4}

# every section is required; tag -> element type ("raw" bytes, "id" = u16 or u32 by
# vocabulary size, "u2|u4" = either, declared in the section table)
_SECTIONS: Final = {
    b"META": "raw",
    b"TRIE": "raw",
    b"TKID": "id",
    b"IDTK": "id",
    b"ALPH": "id",
    b"APOS": "id",
    b"KEY4": "u4",
    b"TOPK": "id",
    b"UNIG": "u4",
    b"ROWS": "u4",
    b"SUCC": "id",
    b"CNTS": "u1",
    b"BIGI": "u4",
    b"BIGC": "u4",
    b"SEGS": "u4",
    b"SEGE": "u4",
    b"SKYP": "u4",
    b"SKYI": "u2|u4",
    b"SKYC": "u2|u4",
    b"DISI": "id",
    b"DISO": "u4",
    b"DISB": "raw",
}
# sections whose size grows with the number of bigrams are checksummed only with
# verify=True, so opening stays fast; all the others (vocabulary-sized) on every load
_BIGRAM_SIZED: Final = (b"SUCC", b"CNTS", b"BIGI", b"BIGC", b"SEGS", b"SEGE", b"SKYP", b"SKYI", b"SKYC")
_CHECKED_ON_LOAD: Final = tuple(t for t in _SECTIONS if t not in _BIGRAM_SIZED)
_U32_MAX: Final = 0xFFFFFFFF
# optional sections checksummed on every load: vocabulary-sized and sparse ones (the
# trigram-sized ones only with verify=True; queries check what they read from them)
_OPTIONAL_CHECKED_ON_LOAD: Final = (
    b"HIST", b"HN13", b"HDRI", b"HDRV", b"TLEI", b"TLEV", b"TBGI", b"TBGC", b"TLNI", b"TLNV", b"TDRI", b"TDRV",
    b"RWEH", b"RWEB", b"UNEH", b"UNEB", b"HSEH", b"HSEB", b"N1EH", b"N1EB", b"N2EH", b"N2EB", b"HDIH", b"HDIB",
    b"HDVH", b"HDVB",
)  # fmt: skip


def _id_dtype(n_words: int) -> np.dtype:
    # positions/ids go up to n+2 (<s>), TOPK pads with the dtype maximum
    return np.dtype("<u2") if n_words + 3 < 0xFFFF else np.dtype("<u4")


def key_head(key: str, pad: int = 0) -> int:
    """First 4 UTF-8 bytes of a key as a big-endian number, padded with ``pad`` bytes.

    UTF-8 byte order is code-point order, so these numbers sort like the keys and the
    keys starting with a prefix of at most 4 bytes are exactly those whose head lies in
    [key_head(prefix, 0x00), key_head(prefix, 0xFF)].
    """
    b = key.encode("utf-8")[:4]
    return int.from_bytes(b + bytes([pad]) * (4 - len(b)), "big")


def topk_levels(n_pos: int) -> list[int]:
    """Number of blocks at each level of the prefix top lists, bottom level first."""
    levels = []
    size = TOPK_FANOUT
    while True:
        nb = -(-n_pos // size)
        levels.append(nb)
        if nb <= TOPK_FANOUT:
            return levels
        size *= TOPK_FANOUT


# ----------------------------------------------------------------------------- writing


def atomic_write(path: str | os.PathLike[str], chunks: Iterable[bytes | memoryview], *, mode: int = 0o644) -> None:
    """Write ``chunks`` (streamed, consumed once) to ``path``: readers see the old file or the whole new one.

    A temporary file in the same directory is written, fsync'd and renamed over the
    target; the directory is fsync'd too so the rename survives a power cut. ``mode``
    is the new file's permission bits (model files are 0644; a personal layer, which
    describes one person, is 0600). An OSError names ``path``, never the temporary
    file (the caller knows only ``path``).
    """
    target = Path(path)
    directory = target.parent if str(target.parent) else Path(".")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=directory)
    except OSError as e:
        raise _named(e, target) from None
    try:
        with os.fdopen(fd, "wb") as f:
            for c in chunks:
                f.write(c)
            f.flush()
            os.fsync(f.fileno())
        os.chmod(tmp, mode)
        os.replace(tmp, target)
    except BaseException as e:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if isinstance(e, OSError):
            raise _named(e, target) from None
        raise
    try:
        dfd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(dfd)
    except OSError:
        pass
    finally:
        os.close(dfd)


def _named(e: OSError, target: Path) -> OSError:
    """The same kind of OSError, naming the file the caller asked for."""
    return type(e)(e.errno, e.strerror or str(e), os.fspath(target))


def history_counts(unigram: np.ndarray, n: int) -> np.ndarray:
    """c(v) for every history id, derived from the unigram counts (nothing is stored).

    Every word or ``<unk>`` token is followed by exactly one token (a word, ``<unk>`` or
    ``</s>``), so its count as a history equals its count as a predicted token; ``</s>``
    is never a history; ``<s>`` starts each sentence, which ends with one ``</s>``.
    """
    hist = np.zeros(n + 3, dtype=np.int64)
    hist[: n + 2] = unigram[: n + 2]
    hist[n] = 0
    hist[n + 2] = unigram[n]
    return hist


def _rank_order(ids: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Offsets in (count descending, id ascending) order, ties kept in offset order.

    Long segments sort one packed 64-bit key (faster than a two-key lexsort there, slower
    on short arrays); short ones, and inputs the packing cannot hold, use the lexsort.
    """
    c = np.asarray(counts)
    i = np.asarray(ids)
    if len(c) >= 1024 and c.min() >= 0 and i.min() >= 0 and i.max() <= _U32_MAX and c.max() <= _U32_MAX:
        key = (np.uint64(c.max()) - c.astype(np.uint64)) << np.uint64(32)
        key |= i.astype(np.uint64)
        return np.argsort(key, kind="stable")
    # for unsigned counts, ~c is max - c: descending without a copy to a signed type
    return np.lexsort((i, ~c if c.dtype.kind == "u" else -c.astype(np.int64)))


def _skyband(ids: np.ndarray, counts: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """The k-skyband of a row segment, by number of dominators, and its size for each k.

    Entry x dominates entry w when c(v,x) >= c(v,w) and x's id is smaller (which implies
    c(x) >= c(w) and, on equal counts, an earlier word): x then scores at least as high
    for any λ in [0, 1) and wins ties, so w cannot be among the top j if j entries
    dominate it. Scanning in (count desc, id asc) order, w's dominators are exactly the
    earlier entries with smaller ids. Returns the offsets of the entries with fewer than
    k dominators, sorted by (dominators, offset), and for j = 1..k how many of them have
    fewer than j dominators (a query for the top j reads only that many).

    The scan keeps the k smallest ids seen so far; only an id below the largest of them
    (``bound``) can be in the band, and such ids get rarer as the scan goes on. The
    first entries are compared in a plain loop; past them, numpy picks each chunk's ids
    below the bound at the chunk's start (a superset, as the bound only falls), so only
    those reach Python.
    """
    order = _rank_order(ids, counts)
    seq = np.asarray(ids)[order]
    n = len(seq)
    head = seq[: max(256, k)].tolist()  # at least the k entries that fill ``smallest``
    smallest: list[int] = []  # the k smallest ids seen so far, sorted
    found_dom: list[int] = []  # numbers of dominators of the band entries, in scan order
    found_pos: list[int] = []  # and their positions in seq
    for p, x in enumerate(head[:k]):  # fewer than k entries before these: all in the band
        found_dom.append(bisect.bisect_left(smallest, x))
        found_pos.append(p)
        bisect.insort(smallest, x)
    if n > k:
        bound = smallest[-1]
        for p, x in enumerate(head[k:], k):
            if x < bound:
                found_dom.append(bisect.bisect_left(smallest, x))
                found_pos.append(p)
                bisect.insort(smallest, x)
                smallest.pop()
                bound = smallest[-1]
        pos, chunk = len(head), 1024
        while pos < n:
            part = seq[pos : pos + chunk]
            cand = np.flatnonzero(part < bound)
            for p, x in zip((cand + pos).tolist(), part[cand].tolist()):
                if x < bound:
                    found_dom.append(bisect.bisect_left(smallest, x))
                    found_pos.append(p)
                    bisect.insort(smallest, x)
                    smallest.pop()
                    bound = smallest[-1]
            pos += chunk
            chunk = min(chunk * 4, 1 << 16)
    offsets = order[np.asarray(found_pos, dtype=np.int64)]
    doms = np.asarray(found_dom, dtype=np.int64)
    by = np.lexsort((offsets, doms))
    cumulative = np.searchsorted(doms[by], np.arange(1, k + 1), side="left")
    return offsets[by], cumulative


def _adjacent_lcp(keys: Sequence[str]) -> np.ndarray:
    """Length of the common prefix (in characters) of each key and the next one.

    Compared as fixed-width arrays of the first 16 code points, a block of keys at a time
    (bounded memory); the few pairs that agree on all 16 are finished in Python.
    """
    n = len(keys)
    width = 16
    lengths = np.fromiter(map(len, keys), dtype=np.int64, count=n)
    lcp = np.zeros(max(n - 1, 0), dtype=np.int64)
    block = 1 << 15
    for s in range(0, n - 1, block):
        e = min(n, s + block + 1)
        chars = np.array([k[:width] for k in keys[s:e]], dtype=f"<U{width}").view(np.uint32).reshape(e - s, width)
        same = chars[:-1] == chars[1:]
        lcp[s : e - 1] = np.where(same.all(axis=1), width, same.argmin(axis=1))
        del chars, same
    # a padding position compares equal to a real U+0000: never count past either key
    np.minimum(lcp, lengths[:-1], out=lcp)
    np.minimum(lcp, lengths[1:], out=lcp)
    for i in np.flatnonzero(lcp >= width).tolist():
        a, b = keys[i], keys[i + 1]
        j = width
        while j < len(a) and j < len(b) and a[j] == b[j]:
            j += 1
        lcp[i] = j
    return lcp


def _prefix_groups(keys: Sequence[str], min_len: int) -> list[np.ndarray]:
    """Prefix groups of sorted ``keys``, one array per prefix length d + 1 = 1, 2, ...

    Entry p of array d names the group of keys sharing key p's first d + 1 characters
    (by the position of the group's first key), or is -1 when key p is shorter than
    that. Sorted keys sharing a prefix are contiguous, so with these arrays a row's
    prefix segments are runs of equal values. Arrays stop at the first length where no
    group has more than ``min_len`` keys: a row holds at most a group's keys, and longer
    prefixes only split groups further, so no segment lies beyond.
    """
    n = len(keys)
    if n == 0:
        return []
    lcp = _adjacent_lcp(keys)
    lengths = np.fromiter(map(len, keys), dtype=np.int64, count=n)
    gdt = np.int32 if n < (1 << 31) else np.int64
    positions = np.arange(n, dtype=gdt)
    out: list[np.ndarray] = []
    depth = 0
    while True:
        starts = np.ones(n, dtype=bool)
        starts[1:] = lcp < depth + 1  # key p starts a group unless it shares d + 1 chars with p - 1
        first = np.flatnonzero(starts)
        sizes = np.diff(first, append=n)
        long_enough = lengths[first] > depth
        if not long_enough.any() or int(sizes[long_enough].max()) <= min_len:
            return out
        group = np.maximum.accumulate(np.where(starts, positions, 0))
        group[lengths <= depth] = -1
        out.append(group)
        depth += 1


#: Row entries looked at together when finding prefix segments (bounds the temporaries).
_SEGMENT_BATCH: Final = 1 << 20


def _prefix_segments(
    groups: list[np.ndarray], pos: np.ndarray, starts: np.ndarray, ends: np.ndarray, min_len: int
) -> tuple[np.ndarray, np.ndarray]:
    """Ranges [s, e) of successors sharing a prefix, for every prefix with > min_len of them.

    ``pos`` holds alphabetical positions, sorted within each row; ``starts``/``ends``
    bound the rows' word successors (disjoint ranges of ``pos``); ``groups`` comes from
    :func:`_prefix_groups` over the alphabetical keys with the same ``min_len``. The
    successors whose keys start with a given string form one contiguous range, and the
    ranges nest like the prefixes do: each row (the empty prefix), then for each prefix
    length the runs of equal group. Rows are taken in batches of about
    ``_SEGMENT_BATCH`` entries, so the index arrays stay small however many pairs there
    are. Returns the distinct ranges sorted by (start, end), as two int64 arrays.
    """
    starts = np.asarray(starts, dtype=np.int64)
    ends = np.asarray(ends, dtype=np.int64)
    keep = ends - starts > min_len
    starts, ends = starts[keep], ends[keep]
    seg_s = [starts]
    seg_e = [ends]
    cum = np.cumsum(ends - starts)
    first = 0
    while first < len(starts):
        # rows first..last-1: at least one, about _SEGMENT_BATCH entries
        done = int(cum[first - 1]) if first else 0
        last = max(first + 1, int(np.searchsorted(cum, done + _SEGMENT_BATCH, side="right")))
        _batch_segments(groups, pos, starts[first:last], ends[first:last], min_len, seg_s, seg_e)
        first = last
    s = np.concatenate(seg_s)
    e = np.concatenate(seg_e)
    order = np.lexsort((e, s))
    s, e = s[order], e[order]
    new = np.ones(len(s), dtype=bool)
    new[1:] = (s[1:] != s[:-1]) | (e[1:] != e[:-1])
    return s[new], e[new]


def _batch_segments(
    groups: list[np.ndarray],
    pos: np.ndarray,
    starts: np.ndarray,
    ends: np.ndarray,
    min_len: int,
    seg_s: list[np.ndarray],
    seg_e: list[np.ndarray],
) -> None:
    """Append the non-empty prefixes' ranges of some rows to ``seg_s``/``seg_e``.

    Only entries inside a long enough run can be in a longer prefix's run, so each
    prefix length looks at fewer entries than the one before.
    """
    lens = ends - starts
    offsets = np.cumsum(lens) - lens
    # the entries still in play (row offsets), and where each current run begins
    idx = np.repeat(starts - offsets, lens)
    idx += np.arange(len(idx), dtype=np.int64)
    brk = np.zeros(len(idx), dtype=bool)
    brk[offsets[lens > 0]] = True
    for group in groups:
        if len(idx) == 0:
            break
        g = group[pos[idx]]
        brk[1:] |= g[1:] != g[:-1]
        first = np.flatnonzero(brk)
        size = np.diff(first, append=len(idx))
        ok = (g[first] >= 0) & (size > min_len)
        seg_s.append(idx[first[ok]])
        seg_e.append(idx[first[ok] + size[ok] - 1] + 1)
        inside = np.repeat(ok, size)
        idx = idx[inside]
        brk = brk[inside]


#: Pairs sorted per block when ordering rows alphabetically (bounds the temporaries).
_SORT_BLOCK: Final = 1 << 20


def _sorted_pairs(
    tables: CountTables, apos: np.ndarray, idt: np.dtype, n_hist: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """The pairs in (history, alphabetical position) order, in their file element types.

    Returns the row offsets (int64), each pair's alphabetical position (``idt``), its
    count (u4) and, for tables with stored history counts, each row's count sum. The
    input is sorted by history (as :class:`CountTables` promises; otherwise it is sorted
    here first), so only the inside of each row needs reordering: that is done a block
    of rows at a time, which keeps the temporaries (a 64-bit sort key, its order) at the
    block's size instead of several 8-byte copies of every pair.
    """
    left, right, count = tables.pair_left, tables.pair_right, tables.pair_count
    n_pairs = len(left)
    if n_pairs > 1 and bool(np.any(left[1:] < left[:-1])):
        by_left = np.argsort(left, kind="stable")
        left, right, count = left[by_left], right[by_left], count[by_left]
        del by_left
    if n_pairs and (int(count.min()) < 0 or int(count.max()) > _U32_MAX):
        raise InvalidArgumentError("pair counts must lie in [0, 2**32)")
    # probes in the ids' own type: mixed types would make numpy copy ``left`` to int64
    probe_type = left.dtype if left.dtype.kind in "iu" and np.iinfo(left.dtype).max >= n_hist else np.dtype(np.int64)
    rows = np.searchsorted(left, np.arange(n_hist + 1, dtype=probe_type), side="left").astype(np.int64)
    if n_pairs and (int(left[0]) < 0 or int(left[-1]) >= n_hist):
        raise InvalidArgumentError("pair history ids out of range")
    n_pos = len(apos)
    succ = np.empty(n_pairs, dtype=idt)
    counts = np.empty(n_pairs, dtype=np.uint32)
    row_sums = np.zeros(n_hist, dtype=np.int64) if tables.history is not None else None
    r0 = 0
    while r0 < n_hist:
        s = int(rows[r0])
        r1 = max(r0 + 1, int(np.searchsorted(rows, s + _SORT_BLOCK, side="right")) - 1)
        r1 = min(r1, n_hist)
        e = int(rows[r1])
        if e > s:
            lb = left[s:e]
            new_row = np.ones(e - s, dtype=bool)
            new_row[1:] = lb[1:] != lb[:-1]
            rp = apos[right[s:e]]
            key = np.cumsum(new_row, dtype=np.int64)
            key *= n_pos
            key += rp
            o = np.argsort(key, kind="stable")  # stable: like a lexsort, should pairs repeat
            del key
            succ[s:e] = rp[o]
            cb = count[s:e][o]
            counts[s:e] = cb
            if row_sums is not None:
                heads = np.flatnonzero(new_row)
                row_sums[lb[heads]] = np.add.reduceat(cb.astype(np.int64), heads)
            del lb, new_row, rp, o, cb
        r0 = r1
    return rows, succ, counts, row_sums


def _row_word_ends(rows: np.ndarray, succ: np.ndarray, row_ids: np.ndarray, n: int) -> np.ndarray:
    """End of the word successors of each given row: </s> and <unk> (alphabetical
    positions n and n + 1) sort last in a row and are no word's prefix."""
    tail = np.flatnonzero(succ >= n)
    n_tail = np.bincount(np.searchsorted(rows, tail, side="right") - 1, minlength=len(rows) - 1)
    return rows[row_ids + 1] - n_tail[row_ids]


def build_sections(
    tables: CountTables,
    *,
    lam: float,
    skyband_k: int = DEFAULT_SKYBAND_K,
    skyband_min: int = DEFAULT_SKYBAND_MIN,
) -> list[tuple[bytes, np.dtype | None, bytes | np.ndarray]]:
    """Turn counts into the arrays of a model file (the explicit build step).

    The bigram-sized arrays are made directly in their file element types, so the step
    needs about twice the file's size on top of its input (see :func:`_sorted_pairs`).
    """
    n = tables.n_words
    if n == 0:
        raise InvalidArgumentError("the vocabulary is empty: no word reached min_count")
    idt = _id_dtype(n)
    eos, unk = n, n + 1
    n_pos = n + 2
    n_hist = n + 3

    trie = marisa_trie.Trie(tables.keys)
    tkid = np.empty(n, dtype=np.int64)
    tkid[np.fromiter(map(trie.key_id, tables.keys), dtype=np.int64, count=n)] = np.arange(n)
    idtk = np.empty(n, dtype=np.int64)
    idtk[tkid] = np.arange(n)
    alpha_words = np.array(sorted(range(n), key=tables.keys.__getitem__), dtype=np.int64)
    alph = np.concatenate([alpha_words, [eos, unk]])
    apos = np.empty(n_pos, dtype=np.int64)
    apos[alph] = np.arange(n_pos)
    alpha_keys = [tables.keys[i] for i in alpha_words.tolist()]
    # key_head of every key at once: numpy cuts/pads the UTF-8 bytes to 4, read big-endian
    key4 = np.array([k.encode("utf-8") for k in alpha_keys], dtype="S4").view(">u4").astype(np.uint32)

    # multi-level top lists over alphabetical positions of words (ids are ranks)
    pad = int(np.iinfo(idt).max)
    levels = []
    size = TOPK_FANOUT
    for nb in topk_levels(n):
        padded = np.full(nb * size, pad, dtype=np.int64)
        padded[:n] = alpha_words
        blocks = np.sort(padded.reshape(nb, size), axis=1)[:, :TOPK_FANOUT]
        levels.append(blocks.reshape(-1))
        size *= TOPK_FANOUT
    topk = np.concatenate(levels)

    unigram = tables.unigram
    if unigram.max(initial=0) > _U32_MAX or unigram.sum() > (1 << 53):
        raise InvalidArgumentError("corpus too large for 32-bit counts")

    rows, right_pos, counts, row_sums = _sorted_pairs(tables, apos.astype(idt), idt, n_hist)
    if rows[-1] > _U32_MAX:
        raise InvalidArgumentError("too many bigrams for 32-bit offsets")
    (_, _, cnts), (_, _, bigi), (_, _, bigc) = EXACT.encode(BIGRAM_TAGS, counts)

    long_rows = np.flatnonzero(np.diff(rows) > skyband_min)
    seg_s_a, seg_e_a = _prefix_segments(
        _prefix_groups(alpha_keys, skyband_min),
        right_pos,
        rows[long_rows],
        _row_word_ends(rows, right_pos, long_rows, n),
        skyband_min,
    )
    longest = int((seg_e_a - seg_s_a).max(initial=0))
    sky_dtype = np.dtype("<u2") if longest <= 0xFFFF else np.dtype("<u4")
    sky_parts, cum_parts = [], []
    for a, b in zip(seg_s_a.tolist(), seg_e_a.tolist()):
        band, cum = _skyband(alph[right_pos[a:b]], counts[a:b], skyband_k)
        sky_parts.append(band.astype(sky_dtype))
        cum_parts.append(cum.astype(sky_dtype))
    del counts
    sky_ptr_a = np.zeros(len(sky_parts) + 1, dtype=np.int64)
    sky_ptr_a[1:] = np.cumsum(np.fromiter(map(len, sky_parts), dtype=np.int64, count=len(sky_parts)))
    skyi = np.concatenate(sky_parts) if sky_parts else np.zeros(0, sky_dtype)
    del sky_parts
    skyc = np.concatenate(cum_parts) if cum_parts else np.zeros(0, sky_dtype)
    del cum_parts
    if tables.history is not None and np.any(row_sums != tables.history):
        raise InvalidArgumentError("history counts disagree with the pairs")

    dis_ids = [i for i, (k, d) in enumerate(zip(tables.keys, tables.displays)) if k != d]
    dis_bytes = [tables.displays[i].encode("utf-8") for i in dis_ids]
    diso = np.concatenate([[0], np.cumsum([len(b) for b in dis_bytes], dtype=np.int64)])

    meta: dict[str, Any] = {
        "generator": "nextword",
        "n_words": n,
        "lambda": float(lam),
        "total": int(unigram.sum()),
        "bigrams": int(rows[-1]),
        "skyband_k": int(skyband_k),
        "skyband_min": int(skyband_min),
        "topk_fanout": TOPK_FANOUT,
        "max_key_chars": max(map(len, tables.keys)),
        "stats": {k: int(v) for k, v in tables.stats.items()},
    }
    u4, u1 = np.dtype("<u4"), np.dtype("<u1")
    return [
        (b"META", None, msgpack.packb(meta, use_bin_type=True)),
        (b"TRIE", None, trie.tobytes()),
        (b"TKID", idt, tkid),
        (b"IDTK", idt, idtk),
        (b"ALPH", idt, alph),
        (b"APOS", idt, apos),
        (b"KEY4", u4, key4),
        (b"TOPK", idt, topk),
        (b"UNIG", u4, unigram),
        (b"ROWS", u4, rows),
        (b"SUCC", idt, right_pos),
        (b"CNTS", u1, cnts),
        (b"BIGI", u4, bigi),
        (b"BIGC", u4, bigc),
        (b"SEGS", u4, seg_s_a),
        (b"SEGE", u4, seg_e_a),
        (b"SKYP", u4, sky_ptr_a),
        (b"SKYI", sky_dtype, skyi),
        (b"SKYC", sky_dtype, skyc),
        (b"DISI", idt, np.asarray(dis_ids, dtype=np.int64)),
        (b"DISO", u4, diso),
        (b"DISB", None, b"".join(dis_bytes)),
    ] + ([(b"HIST", u4, tables.history)] if tables.history is not None else [])


def encode_sections(
    sections: list[tuple[bytes, np.dtype | None, bytes | np.ndarray]], *, minor: int = 0
) -> list[bytes | memoryview]:
    """Lay sections out after the header and table; returns the file as byte chunks.

    An array already in its file element type is not copied: its chunk is a byte view of
    it (keeping it alive), and padding goes in a chunk of its own, so the chunks add
    little to the memory the sections already hold. Every chunk's ``len`` is its size in
    bytes.
    """
    table_end = HEADER.size + ENTRY.size * len(sections)
    offset = -(-table_end // ALIGN) * ALIGN
    entries: list[bytes] = []
    payloads: list[bytes | memoryview] = []
    for tag, dtype, data in sections:
        raw: bytes | memoryview
        if dtype is None:
            raw = bytes(data)  # type: ignore[arg-type]
            code = 0
        else:
            arr = np.asarray(data)
            if arr.size and (arr.min() < 0 or arr.max() > np.iinfo(dtype).max):
                raise InvalidArgumentError(f"section {tag.decode()} does not fit {dtype}")
            raw = np.ascontiguousarray(arr, dtype=dtype).reshape(-1).view(np.uint8).data
            code = _CODES[dtype]
        entries.append(ENTRY.pack(tag, code, offset, len(raw), zlib.crc32(raw)))
        payloads.append(raw)
        padding = -len(raw) % ALIGN
        if padding:
            payloads.append(b"\0" * padding)
        offset += len(raw) + padding
    table = b"".join(entries)
    head = HEADER.pack(MAGIC, FORMAT_VERSION[0], minor, len(sections), offset, zlib.crc32(table), 0)
    head = head[:-4] + struct.pack("<I", zlib.crc32(head[:-4]))
    gap = b"\0" * (-(-table_end // ALIGN) * ALIGN - table_end)
    return [head, table, gap, *payloads]


def write_model(
    tables: CountTables,
    path: str | os.PathLike[str],
    *,
    lam: float,
    skyband_k: int = DEFAULT_SKYBAND_K,
    skyband_min: int = DEFAULT_SKYBAND_MIN,
) -> None:
    """Build the model arrays from ``tables`` and write them atomically to ``path``."""
    sections = build_sections(tables, lam=lam, skyband_k=skyband_k, skyband_min=skyband_min)
    atomic_write(path, encode_sections(sections, minor=2 if tables.history is not None else 0))


def _discount_checks(discounts: list[list[float]], order: int) -> tuple[list[list[float]], dict[str, str]]:
    """Discounts the exact ranking can use, and a note per order that had to change.

    The stored skybands dominate on the bigram level's stored value, so they assume that
    its first term max(a − D(a), 0) grows strictly with a, i.e. 1 − D₁ < 2 − D₂ < 3 − D₃.
    Chen & Goodman's estimates usually satisfy it at that level; when they do not, the
    level takes one discount D₁ for every count (strictly increasing a − D₁), and the
    note says why. The trigram level's skybands (§7.16) need the same of its discounts.
    The unigram level needs nothing: ids rank by its floor value itself.
    """
    out = [list(d) for d in discounts]
    notes: dict[str, str] = {}
    for m in range(2, order + 1):
        d1, d2, d3 = out[m - 1]
        if not (1 - d1 < 2 - d2 < 3 - d3):
            notes[str(m)] = (
                f"discounts ({d1:.6g}, {d2:.6g}, {d3:.6g}) do not keep 1-D1 < 2-D2 < 3-D3, which the exact "
                f"ranking needs; one discount D1 = {d1:.6g} for every count"
            )
            out[m - 1] = [d1, d1, d1]
    return out, notes


def _n123(owner: np.ndarray, value: np.ndarray, n_owner: int) -> np.ndarray:
    """(n_owner, 3): how many of each owner's values are 1, 2 and >= 3."""
    out = np.zeros((n_owner, 3), dtype=np.int64)
    for j, mask in enumerate((value == 1, value == 2, value >= 3)):
        out[:, j] = np.bincount(owner[mask], minlength=n_owner)
    return out


def level_mix(
    kn: bool, param: Any, value: Any, total: Any, dropped: Any, n123: Any, lower: Any
) -> Any:
    """One interpolation step, α(value) + γ · lower, for floats or float64 arrays alike.

    Kneser-Ney (``param`` = the level's [D₁, D₂, D₃₊]): α = max(a − D(a), 0)/T and
    γ = (dropped + D₁n₁ + D₂n₂ + D₃n₃)/T; Jelinek-Mercer (``param`` = λ): α = λ·c/T and
    γ = (1 − λ) + λ·dropped/T. T is the context's total, stored values plus the dropped
    mass (0 unless pruned), so each context's distribution sums to 1 either way. The
    build (skybands) and the queries call this one function, so both compute the same
    floating-point numbers, in the operation order of the dict oracles.
    """
    n1, n2, n3 = n123
    if kn:
        d = param
        if isinstance(value, np.ndarray):
            disc = np.where(value >= 3, d[2], np.where(value >= 2, d[1], np.where(value >= 1, d[0], 0.0)))
            alpha = np.maximum(value - disc, 0.0) / total
        else:
            one = 0.0 if value <= 0 else d[0] if value < 2 else d[1] if value < 3 else d[2]
            alpha = max(value - one, 0.0) / total
        return alpha + (dropped + d[0] * n1 + d[1] * n2 + d[2] * n3) / total * lower
    return jm_step(param, value, total, lower, dropped)


def _rows_lookup(key_rows: np.ndarray, values: np.ndarray, keys: np.ndarray) -> np.ndarray:
    """values[i] where key_rows[i] == key, else 0, for each key (key_rows sorted)."""
    if len(key_rows) == 0:
        return np.zeros(len(keys), dtype=np.int64)
    at = np.minimum(np.searchsorted(key_rows, keys), len(key_rows) - 1)
    return np.where(key_rows[at] == keys, values[at], 0).astype(np.int64)


def trigram_lower_scores(
    kn: bool,
    param: Any,
    floor: np.ndarray,
    rows: np.ndarray,
    succ: np.ndarray,
    values2: np.ndarray,
    hist: np.ndarray,
    dropped2: np.ndarray,
    n123_2: np.ndarray | None,
    ctx_v: np.ndarray,
    tpos: np.ndarray,
    alph: np.ndarray,
) -> np.ndarray:
    """The bigram-level score B(v, w) = α₂(v w) + γ₂(v)·P₁(w) of every trigram (u, v, w).

    ``ctx_v`` is each trigram's v, ``tpos`` its successor's alphabetical position; the
    bigram level is the file's rows (``rows``, ``succ``, ``values2``) with their totals
    and dropped mass. The trigram skybands dominate on (trigram value, B) (§7.16).
    """
    n_pos = len(alph)
    n_rows = len(rows) - 1
    row_of = np.repeat(np.arange(n_rows, dtype=np.int64), np.diff(rows))
    key2 = row_of * n_pos + succ.astype(np.int64)
    key3 = ctx_v.astype(np.int64) * n_pos + tpos.astype(np.int64)
    c2 = _rows_lookup(key2, values2.astype(np.int64), key3)
    v = ctx_v.astype(np.int64)
    tot = hist[v].astype(np.int64)
    if len(tot) and int(tot.min()) <= 0:
        raise InvalidArgumentError("a trigram context whose last word has no bigram total")
    n123 = (0, 0, 0) if n123_2 is None else (n123_2[v, 0], n123_2[v, 1], n123_2[v, 2])
    lower = floor[alph[tpos.astype(np.int64)].astype(np.int64)]
    return np.asarray(level_mix(kn, param, c2, tot, dropped2[v], n123, lower), dtype=np.float64)


def trigram_band_min(skyband_min: int, trigram_skyband_min: int | None, *, compact: bool = False) -> int:
    """The trigram rows' band threshold: the given one, else the default capped by ``skyband_min``.

    A compact (1.6) file defaults to ``skyband_min`` itself, as the bigram rows: there a
    band costs about as much as the successors it stands for (its offsets are u16, the
    successors about 1.2 bytes), so bands only for the segments where a cut would cost most
    (measured in bench/bench_quant.py: 1.94 → 1.91 bytes per n-gram, 24 → 64).
    """
    if trigram_skyband_min is None:
        return skyband_min if compact else min(skyband_min, DEFAULT_TRIGRAM_SKYBAND_MIN)
    if isinstance(trigram_skyband_min, bool) or not isinstance(trigram_skyband_min, int) or trigram_skyband_min < 0:
        raise InvalidArgumentError(f"trigram_skyband_min must be an integer >= 0, got {trigram_skyband_min!r}")
    return trigram_skyband_min


def trigram_bands(
    starts: np.ndarray,
    tpos: np.ndarray,
    tids: np.ndarray,
    values3: np.ndarray,
    lower: np.ndarray,
    alpha_keys: Sequence[str],
    n: int,
    skyband_k: int,
    skyband_min: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """TSGS, TSGE, TSKP, TSKI, TSKC: the k-skyband of every long trigram row segment.

    Segments are the prefix segments of the trigram rows (as for the bigram rows, §7.9).
    Entry x dominates w when x's trigram value is ≥ w's and x comes first in (B desc,
    word id asc), B = :func:`trigram_lower_scores`, ``tids`` the successors' word ids (the
    ranking's tie rule: equal scores go to the smaller id); see docs/SEAMS.md.
    """
    t = len(tpos)
    owner = np.repeat(np.arange(len(starts) - 1, dtype=np.int64), np.diff(starts))
    long_ctx = np.flatnonzero(np.diff(starts) > skyband_min)
    seg_s, seg_e = _prefix_segments(
        _prefix_groups(alpha_keys, skyband_min),
        tpos,
        starts[long_ctx],
        _row_word_ends(starts, tpos, long_ctx, n),
        skyband_min,
    )
    rank = np.empty(t, dtype=np.int64)
    if len(seg_s):
        # ranks matter only within a segment: order just the entries inside some segment
        # (segments may nest, the mask counts each entry once); same bands as ranking all t
        edge = np.zeros(t + 1, dtype=np.int64)
        np.add.at(edge, seg_s, 1)
        np.add.at(edge, seg_e, -1)
        inside = np.flatnonzero(np.cumsum(edge[:t]) > 0)
        order = np.lexsort((np.asarray(tids, dtype=np.int64)[inside], -lower[inside], owner[inside]))
        rank[inside[order]] = np.arange(len(inside))
    longest = int((seg_e - seg_s).max(initial=0))
    sky_dtype = np.dtype("<u2") if longest <= 0xFFFF else np.dtype("<u4")
    bands, cums = [], []
    for a, b in zip(seg_s.tolist(), seg_e.tolist()):
        band, cum = _skyband(rank[a:b], values3[a:b], skyband_k)
        bands.append(band.astype(sky_dtype))
        cums.append(cum.astype(sky_dtype))
    skyp = np.zeros(len(bands) + 1, dtype=np.int64)
    skyp[1:] = np.cumsum(np.fromiter(map(len, bands), dtype=np.int64, count=len(bands)))
    skyi = np.concatenate(bands) if bands else np.zeros(0, sky_dtype)
    skyc = np.concatenate(cums) if cums else np.zeros(0, sky_dtype)
    return seg_s, seg_e, skyp, skyi.astype(sky_dtype), skyc.astype(sky_dtype)


def build_ngram_sections(
    counts: Any,
    tables: CountTables,
    estimator: Any,
    *,
    skyband_k: int = DEFAULT_SKYBAND_K,
    skyband_min: int = DEFAULT_SKYBAND_MIN,
    trigram_skyband_min: int | None = None,
    fitted: Any = None,
    codec: Codec = EXACT,
    compact: bool = False,
) -> tuple[list[tuple[bytes, np.dtype | None, bytes | np.ndarray]], int]:
    """The sections of a model file for any estimator and order 2 or 3, and its minor version.

    ``counts`` (:class:`~nextword.ngrams.NgramCounts`) holds the n-grams in the ids of
    ``tables`` (which gives the keys, spellings and corpus statistics); ``estimator``
    (:class:`~nextword.estimators.Estimator`) fits the values to store, unless
    ``fitted`` (its :class:`~nextword.estimators.Fitted`, e.g. a pruned one) is given.
    A Jelinek-Mercer bigram gives exactly the file :func:`build_sections` gives (format
    1.0). Otherwise ids are re-ranked by the estimator's unigram level (Kneser-Ney: the
    continuation counts, ties by key), the bigram rows hold the bigram level's values,
    HIST their context totals, HN13 the bigram contexts' n₁/n₂/n₃₊ (Kneser-Ney), and
    order 3 adds the trigram sections; see docs/FORMAT.md §7.11–7.16.

    Pruned levels: a :class:`~nextword.estimators.base.Level` whose ``ctx_total`` exceeds
    the sum of a context's stored values has *dropped mass*; the file records it
    (HDRI/HDRV for the bigram level, TDRI/TDRV for the trigram level) and γ takes it in,
    so every context still sums to 1.

    ``codec`` (:mod:`nextword.codecs`) chooses how the bigram and trigram values are
    stored. A quantising codec replaces each level's values by their decoded values
    first (``codec.quantize``), keeping each context's dropped mass; every total, n₁/n₂/n₃₊
    and skyband is then computed from the decoded values, so the file is one consistent
    (quantised) model and writes format 1.5.

    ``compact`` writes format 1.6 instead (:func:`compact_sections`, docs/FORMAT.md §7.18):
    the same model with its successor lists and starts coded by chunked Elias-Fano, any
    estimator and order and either codec, the Jelinek-Mercer bigram included.
    """

    n = tables.n_words
    quant = codec.name != EXACT.name
    if counts.n_words != n:
        raise InvalidArgumentError(f"counts are over {counts.n_words} words, the tables over {n}")
    order = counts.order
    if order not in ORDERS:
        raise InvalidArgumentError(f"order must be one of {', '.join(map(str, ORDERS))}, got {order!r}")
    if tables.history is not None:
        raise InvalidArgumentError("pruned counts can only be stored as a Jelinek-Mercer bigram model for now")
    if fitted is None:
        fitted = estimator.fit(counts)
    kn = isinstance(fitted, FittedKneserNey)
    if not kn and not isinstance(fitted, FittedJelinekMercer):
        raise InvalidArgumentError(f"no model file layout for estimator {getattr(fitted, 'name', fitted)!r}")
    if fitted.order != order:
        raise InvalidArgumentError(f"the fitted model is of order {fitted.order}, the counts of order {order}")
    lev1, lev2 = fitted.levels[0], fitted.levels[1]
    uni = np.zeros(n + 2, dtype=np.int64)
    uni[lev1.grams[:, 0]] = lev1.value
    lam2 = 0.0
    if not kn:
        lam2 = float(fitted.lams[1])
        if order == 2 and not quant and not compact:
            if len(lev2.value) and bool(np.any(lev2.ctx_total != np.add.reduceat(lev2.value, lev2.ctx_start[:-1]))):
                raise InvalidArgumentError("a pruned Jelinek-Mercer bigram is written by the pruning step (format 1.2)")
            return build_sections(tables, lam=lam2, skyband_k=skyband_k, skyband_min=skyband_min), 0
        if order == 3 and not np.array_equal(uni, np.asarray(tables.unigram, dtype=np.int64)):
            raise InvalidArgumentError("the n-gram counts disagree with the tables' unigram counts")
    # new ids: words by the floor descending, ties by key (JM: c(w)/N, the ids unchanged)
    stored: list[list[float]] = []
    if kn:
        stored, notes = _discount_checks([[d.d1, d.d2, d.d3] for d in fitted.discounts], order)
        floor = unigram_floor(uni, stored[0], int(uni.sum()))
    else:
        floor = uni / int(uni.sum())
    alpha_rank = np.empty(n, dtype=np.int64)
    alpha_rank[np.array(sorted(range(n), key=tables.keys.__getitem__), dtype=np.int64)] = np.arange(n)
    old_of_new = np.lexsort((alpha_rank, -floor[:n]))
    remap = np.arange(n + 3, dtype=np.int64)
    remap[old_of_new] = np.arange(n)
    keys = [tables.keys[i] for i in old_of_new.tolist()]
    displays = [tables.displays[i] for i in old_of_new.tolist()]
    unigram = np.zeros(n + 2, dtype=np.int64)
    unigram[remap[: n + 2]] = uni
    floor_new = np.empty(n + 2, dtype=np.float64)
    floor_new[remap[: n + 2]] = floor
    g2 = remap[lev2.grams]
    o2 = np.lexsort((g2[:, 1], g2[:, 0]))
    left, right, value2 = g2[o2, 0], g2[o2, 1], lev2.value[o2]
    n_hist = n + 3
    row_sum = np.bincount(left, weights=value2, minlength=n_hist).astype(np.int64)
    history = np.zeros(n_hist, dtype=np.int64)
    if len(lev2.ctx):
        history[remap[lev2.ctx[:, 0]]] = lev2.ctx_total
    dropped2 = history - row_sum
    if bool(np.any(dropped2 < 0)):
        raise InvalidArgumentError("a bigram context total is below the sum of its stored values")
    if quant:  # the decoded values, each context keeping its dropped mass: T = Σ decoded + r
        value2 = codec.quantize(value2)
        history = np.bincount(left, weights=value2, minlength=n_hist).astype(np.int64) + dropped2
    if int(history.max(initial=0)) > _U32_MAX:
        raise InvalidArgumentError("bigram context totals too large for 32-bit fields")
    new_tables = CountTables(keys, displays, unigram, left, right, value2, dict(tables.stats), None)
    sections = build_sections(new_tables, lam=0.0 if kn else lam2, skyband_k=skyband_k, skyband_min=skyband_min)
    meta = msgpack.unpackb(sections[0][2], raw=False)
    meta["estimator"] = "kn" if kn else "jm"
    meta["order"] = order
    meta["codec"] = codec.meta()
    at = [tag for tag, _, _ in sections].index(BIGRAM_TAGS[0])
    file_values2 = np.asarray(sections[at][2], dtype=np.int64)  # CNTS, BIGI, BIGC: the rows' order
    file_values2[np.asarray(sections[at + 1][2], dtype=np.int64)] = np.asarray(sections[at + 2][2], dtype=np.int64)
    if quant:  # the same (already decoded) values, in the rows' order, as codes
        sections[at : at + 3] = codec.encode(BIGRAM_TAGS, file_values2)
    idt = _id_dtype(n)
    u4 = np.dtype("<u4")
    hdri = np.flatnonzero(dropped2 > 0)
    sections += [(b"HIST", u4, history), (b"HDRI", idt, hdri), (b"HDRV", u4, dropped2[hdri])]
    n123_2 = None
    if kn:
        meta["discounts"] = stored
        why = {str(m): r for m, r in fitted.fallbacks.items()}
        for m, r in notes.items():
            why[m] = f"{why[m]}; {r}" if m in why else r
        meta["discount_notes"] = why
        n123_2 = _n123(left, value2, n_hist)
        sections.append((b"HN13", u4, n123_2.reshape(-1)))
    elif order == 3:
        meta["lambda3"] = float(fitted.lams[2])
    if order == 3:
        alph = np.asarray(sections[4][2], dtype=np.int64)  # ALPH, as build_sections made it
        apos = np.empty(n + 2, dtype=np.int64)
        apos[alph] = np.arange(n + 2)
        rows = np.asarray(sections[9][2], dtype=np.int64)  # ROWS, SUCC: the bigram entries
        succ2 = np.asarray(sections[10][2], dtype=np.int64)
        b = len(succ2)
        n_pos = n + 2
        key2 = np.repeat(np.arange(n_hist, dtype=np.int64), np.diff(rows)) * n_pos + succ2  # sorted
        lev3 = fitted.levels[2]
        g3 = remap[lev3.grams]
        pos = apos[g3[:, 2]]
        tot_of_gram = np.repeat(lev3.ctx_total, np.diff(lev3.ctx_start))
        o3 = np.lexsort((pos, apos[g3[:, 1]], g3[:, 0]))  # in bigram entry order (u, then v's position)
        u, v, pos, value3, tot_of_gram = g3[o3, 0], g3[o3, 1], pos[o3], lev3.value[o3], tot_of_gram[o3]
        t = len(u)
        new_ctx = np.ones(t, dtype=bool)
        new_ctx[1:] = (u[1:] != u[:-1]) | (v[1:] != v[:-1])
        first = np.flatnonzero(new_ctx)
        j = len(first)
        ckey = u[first] * n_pos + apos[v[first]]
        big = np.searchsorted(key2, ckey)  # each context's bigram entry (u, v)
        if j and (int(big.max()) >= b or not bool(np.all(key2[np.minimum(big, b - 1)] == ckey))):
            raise InvalidArgumentError("a trigram context (u, v) is not a stored bigram; a pruned bigram level must keep it")
        owner = np.cumsum(new_ctx) - 1
        ctx_starts = np.concatenate([first, [t]]).astype(np.int64)
        lengths = np.zeros(b, dtype=np.int64)
        lengths[big] = np.diff(ctx_starts)
        starts = np.zeros(b + 1, dtype=np.int64)
        np.cumsum(lengths, out=starts[1:])
        sums = np.bincount(owner, weights=value3, minlength=j).astype(np.int64)
        dropped3 = tot_of_gram[first].astype(np.int64) - sums
        if bool(np.any(dropped3 < 0)):
            raise InvalidArgumentError("a trigram context total is below the sum of its stored values")
        if quant:
            value3 = codec.quantize(value3)
            sums = np.bincount(owner, weights=value3, minlength=j).astype(np.int64)
        if t and (int(value3.max()) > _U32_MAX or int((sums + dropped3).max()) > _U32_MAX or t > _U32_MAX):
            raise InvalidArgumentError("too many trigrams (or counts too large) for 32-bit fields")
        tctb = starts[: b + 1 : CTX_BLOCK]
        n123_3 = _n123(owner, value3, j)
        long_ctx = np.flatnonzero(np.diff(ctx_starts) > SUMMARY_MIN)
        tlnv = np.column_stack([sums[long_ctx], n123_3[long_ctx]]).reshape(-1)
        tdri = np.flatnonzero(dropped3 > 0)
        lower = trigram_lower_scores(
            kn, stored[1] if kn else lam2, floor_new, rows, succ2, file_values2, history, dropped2, n123_2, v, pos, alph,
        )  # fmt: skip
        alpha_keys = [keys[i] for i in alph[:n].tolist()]
        tmin = trigram_band_min(skyband_min, trigram_skyband_min, compact=compact)
        tsgs, tsge, tskp, tski, tskc = trigram_bands(ctx_starts, pos, alph[pos.astype(np.int64)], value3, lower, alpha_keys, n, skyband_k, tmin)
        sections += [
            (b"TCTB", u4, tctb),
            *EXACT.encode(CONTEXT_TAGS, lengths),
            (b"TSUC", idt, pos),
            *codec.encode(TRIGRAM_TAGS, value3),
            (b"TLNI", u4, big[long_ctx]),
            (b"TLNV", u4, tlnv),
            (b"TDRI", u4, big[tdri]),
            (b"TDRV", u4, dropped3[tdri]),
            (b"TSGS", u4, tsgs),
            (b"TSGE", u4, tsge),
            (b"TSKP", u4, tskp),
            (b"TSKI", tski.dtype, tski),
            (b"TSKC", tskc.dtype, tskc),
        ]
        meta["trigrams"] = int(t)
        meta["trigram_contexts"] = int(j)
        meta["trigram_summary_min"] = SUMMARY_MIN
        meta["trigram_skyband_min"] = tmin
    sections[0] = (b"META", None, msgpack.packb(meta, use_bin_type=True))
    minor = QUANT_MINOR if quant else NGRAM_MINOR
    return compact_sections(sections, minor) if compact else (sections, minor)


def _ef_sections(head_tag: bytes, bits_tag: bytes, values: np.ndarray) -> list[tuple[bytes, np.dtype | None, bytes | np.ndarray]]:
    """The two sections of one chunked Elias-Fano sequence (§7.18): u32 headers when they fit, else u64."""
    head, stream = ef_encode(values)
    wide = len(head) and int(head.max()) > _U32_MAX
    return [(head_tag, np.dtype("<u8") if wide else np.dtype("<u4"), head), (bits_tag, np.dtype("<u1"), stream)]


def compact_sections(
    sections: list[tuple[bytes, np.dtype | None, bytes | np.ndarray]], minor: int
) -> tuple[list[tuple[bytes, np.dtype | None, bytes | np.ndarray]], int]:
    """The format 1.6 sections of a 1.4/1.5 file's sections (docs/FORMAT.md §7.18).

    The same model, with its monotone sequences coded by chunked Elias-Fano: the bigram
    successors as v·(n+2) + position, the trigram successors as their index in v's
    bigram row (every stored trigram (u, v, w) must have its bigram (v, w) stored:
    pruning keeps it), the row starts and the trigram contexts' starts; the per-word and
    per-context counts (UNIG, HIST, N₁ and N₂ of HN13, the dropped masses) as their
    prefix sums, the sparse tables' indices as themselves; the inverse permutations are
    dropped (a reader computes them).
    """
    if minor not in (NGRAM_MINOR, QUANT_MINOR):
        raise InvalidArgumentError(f"only format 1.{NGRAM_MINOR}/1.{QUANT_MINOR} sections have a compact form, not 1.{minor}")
    by = {tag: (dt, data) for tag, dt, data in sections}
    meta = msgpack.unpackb(by[b"META"][1], raw=False)
    n = int(meta["n_words"])
    n_pos, n_hist = n + 2, n + 3
    idt = _id_dtype(n)
    rows = np.asarray(by[b"ROWS"][1], dtype=np.int64)
    succ = np.asarray(by[b"SUCC"][1], dtype=np.int64)
    row_of = np.repeat(np.arange(n_hist, dtype=np.int64), np.diff(rows))
    new: dict[bytes, list[tuple[bytes, np.dtype | None, bytes | np.ndarray]]] = {
        b"ROWS": _ef_sections(b"RWEH", b"RWEB", rows),
        b"SUCC": _ef_sections(b"SEFH", b"SEFB", row_of * n_pos + succ),
    }
    def prefix(values: Any) -> np.ndarray:
        return np.concatenate([[0], np.cumsum(np.asarray(values, dtype=np.int64))]).astype(np.int64)

    new[b"UNIG"] = _ef_sections(b"UNEH", b"UNEB", prefix(by[b"UNIG"][1]))
    if b"HIST" in by:
        new[b"HIST"] = _ef_sections(b"HSEH", b"HSEB", prefix(by[b"HIST"][1]))
        new[b"HDRI"] = _ef_sections(b"HDIH", b"HDIB", np.asarray(by[b"HDRI"][1], dtype=np.int64))
        new[b"HDRV"] = _ef_sections(b"HDVH", b"HDVB", prefix(by[b"HDRV"][1]))
    if b"HN13" in by:
        n123 = np.asarray(by[b"HN13"][1], dtype=np.int64).reshape(-1, 3)
        new[b"HN13"] = _ef_sections(b"N1EH", b"N1EB", prefix(n123[:, 0])) + _ef_sections(b"N2EH", b"N2EB", prefix(n123[:, 1]))
    if b"TSUC" in by:
        b = len(succ)
        lengths = EXACT.decode("compact", {t.decode(): np.asarray(by[t][1]) for t in CONTEXT_TAGS}, CONTEXT_TAGS).all()
        lengths = np.asarray(lengths, dtype=np.int64)
        starts = np.zeros(b + 1, dtype=np.int64)
        np.cumsum(lengths, out=starts[1:])
        tsuc = np.asarray(by[b"TSUC"][1], dtype=np.int64)
        owner = np.repeat(np.arange(b, dtype=np.int64), lengths)
        alph = np.asarray(by[b"ALPH"][1], dtype=np.int64)
        v = alph[succ[owner]]
        key2 = row_of * n_pos + succ  # increasing: rows by v, then position
        want = v * n_pos + tsuc
        at = np.searchsorted(key2, want)
        if len(at) and (int(at.max()) >= b or not bool(np.all(key2[np.minimum(at, b - 1)] == want))):
            raise InvalidArgumentError("a stored trigram (u, v, w) whose bigram (v, w) is not stored has no compact (1.6) form")
        x = at - rows[v]
        ctx = np.flatnonzero(lengths)
        last = np.zeros(len(ctx), dtype=np.int64)
        if len(ctx):
            last = x[starts[ctx + 1] - 1] + 1  # each context's range: its last index + 1
        base = np.zeros(len(ctx), dtype=np.int64)
        if len(ctx) > 1:
            np.cumsum(last[:-1], out=base[1:])
        y = x + np.repeat(base, lengths[ctx])
        new[b"TCTB"] = _ef_sections(b"TPTH", b"TPTB", starts)
        new[b"TSUC"] = _ef_sections(b"TEFH", b"TEFB", y)
        new[b"TDRI"] = _ef_sections(b"TDIH", b"TDIB", np.asarray(by[b"TDRI"][1], dtype=np.int64))
        new[b"TDRV"] = _ef_sections(b"TDVH", b"TDVB", prefix(by[b"TDRV"][1]))
    meta["successors"] = dict(SUCCESSORS_META)
    meta["dropped_contexts"] = [len(by[b"HDRI"][1])] + ([len(by[b"TDRI"][1])] if b"TDRI" in by else [])
    out: list[tuple[bytes, np.dtype | None, bytes | np.ndarray]] = []
    for tag, dt, data in sections:
        if tag == b"META":
            out.append((tag, None, msgpack.packb(meta, use_bin_type=True)))
        elif tag in new:
            out += new[tag]
        elif tag in _COMPACT_DROPS or tag in _PLAIN_TRIGRAM_ONLY or tag == b"HN13":
            continue  # replaced above, or (IDTK, APOS) computed by the reader
        else:
            out.append((tag, dt, data))
    return out, COMPACT_MINOR


def build(
    counts: Any,
    tables: CountTables,
    estimator: Any,
    path: str | os.PathLike[str],
    *,
    skyband_k: int = DEFAULT_SKYBAND_K,
    skyband_min: int = DEFAULT_SKYBAND_MIN,
    trigram_skyband_min: int | None = None,
    fitted: Any = None,
    codec: Codec = EXACT,
    compact: bool = False,
) -> None:
    """Fit ``estimator`` to ``counts`` and write the model file atomically to ``path``.

    The one entry point from n-gram counts (of any order the format stores) to a file;
    see :func:`build_ngram_sections`. ``fitted`` stores an already fitted (e.g. pruned)
    model instead of fitting ``estimator``: its levels' ``ctx_total`` may exceed the sum
    of a context's values (the dropped mass, recorded so that every context sums to 1).
    """
    sections, minor = build_ngram_sections(
        counts, tables, estimator, skyband_k=skyband_k, skyband_min=skyband_min,
        trigram_skyband_min=trigram_skyband_min, fitted=fitted, codec=codec, compact=compact,
    )
    atomic_write(path, encode_sections(sections, minor=minor))


def rewrite_model(
    src: str | os.PathLike[str],
    dst: str | os.PathLike[str],
    *,
    lam: float,
    buckets: dict[str, list[Any]] | None = None,
) -> None:
    """Copy a model with a new stored λ (and optionally λ by history count), atomically.

    The source is fully verified first and never modified; ``dst`` must be another file.
    ``buckets`` is ``{"bounds": [c1 < c2 < ...], "lambdas": [λ0, λ1, ...]}`` (one more λ
    than bounds); such files are written as format version 1.1.
    """
    check_new_output(src, dst, "tuned model")
    src_meta = read_model(src).meta
    if "codec" in src_meta:  # the layouts of 1.0-1.2 store exact values only
        raise InvalidArgumentError(
            f"a new λ can only be stored in an exact Jelinek-Mercer bigram model (format 1.0-1.2); {os.fspath(src)} is format "
            f"1.{read_model(src).version[1]} with codec {src_meta['codec'].get('name')!r}"
        )
    if src_meta["estimator"] != "jm" or src_meta["order"] != 2:
        raise InvalidArgumentError(
            f"a new λ can only be stored in a Jelinek-Mercer bigram model; {os.fspath(src)} is {src_meta['estimator']} order {src_meta['order']}"
        )
    for x in [lam, *([] if buckets is None else buckets["lambdas"])]:
        if not 0.0 <= float(x) <= MAX_LAMBDA:
            raise InvalidArgumentError(f"a stored λ must lie in [0, {MAX_LAMBDA}] (λ = 1 makes unseen pairs impossible), got {x!r}")
    arrays = read_model(src, verify=True)
    meta = dict(arrays.meta)
    meta.pop("estimator", None)  # implied by format 1.0-1.2 (filled in by the reader)
    meta.pop("order", None)
    meta["lambda"] = float(lam)
    meta.pop("lambda_buckets", None)
    if buckets is not None:
        meta["lambda_buckets"] = {"bounds": [int(b) for b in buckets["bounds"]], "lambdas": [float(x) for x in buckets["lambdas"]]}
    sections: list[tuple[bytes, np.dtype | None, bytes | np.ndarray]] = []
    for tag, kind in _SECTIONS.items():
        label = tag.decode()
        if tag == b"META":
            sections.append((tag, None, msgpack.packb(meta, use_bin_type=True)))
        elif kind == "raw":
            sections.append((tag, None, bytes(arrays.raw[label])))
        else:
            arr = arrays.arrays[label]
            sections.append((tag, arr.dtype, np.array(arr)))
    for tag in _OPTIONAL:
        if tag.decode() in arrays.arrays:
            arr = arrays.arrays[tag.decode()]
            sections.append((tag, arr.dtype, np.array(arr)))
    _check_meta(os.fspath(dst), msgpack.unpackb(sections[0][2], raw=False), 1 << 62)  # type: ignore[arg-type]
    minor = 2 if "HIST" in arrays.arrays else (1 if buckets is not None else 0)
    atomic_write(dst, encode_sections(sections, minor=minor))


# ----------------------------------------------------------------------------- reading


@dataclass
class ModelArrays:
    """Validated, memory-mapped views of a model file's sections."""

    path: str
    version: tuple[int, int]
    meta: dict[str, Any]
    trie: marisa_trie.Trie
    arrays: dict[str, np.ndarray]
    raw: dict[str, memoryview]
    file_size: int
    _mmap: mmap.mmap
    #: the successor lists, whatever their layout (docs/SEAMS.md, "The successor seam")
    succ2: BigramLists
    succ3: TrigramLists | None
    #: each section's length in the file, in bytes (by tag)
    section_bytes: dict[str, int]
    #: the trigram contexts' dropped mass (order 3), whatever its layout
    dropped3: SparseTable | None
    #: tables a 1.6 file keeps coded until read ("HIST": PrefixSums, "HN13": RowCounts), read by index like
    #: the arrays they stand for; absent from ``arrays`` then (decoded there with ``verify=True``)
    views: dict[str, Any]

    def close(self) -> None:
        # arrays keep exporting the buffer while alive; let the GC unmap when they go
        self.arrays.clear()
        self.raw.clear()


def _fail(path: str, msg: str) -> ModelFormatError:
    return ModelFormatError(f"{path}: {msg}")


def read_model(path: str | os.PathLike[str], *, verify: bool = False) -> ModelArrays:
    """Open, map and validate a model file.

    Always checked: magic, version, header and table checksums, file size, section
    bounds, alignment, zero padding and element types, the checksums of every
    vocabulary-sized section (metadata and trie included: the trie library must never
    see damaged bytes), lengths of every array against the metadata, and the
    vocabulary-sized arrays' internal consistency. ``verify=True`` also checksums the
    bigram-sized sections and checks every entry and every derived structure against a
    recomputation, which reads the whole file.
    """
    name = os.fspath(path)
    try:
        f = open(name, "rb")
    except OSError as e:
        raise ModelFormatError(f"{name}: cannot open model: {e.strerror}") from None
    with f:
        size = os.fstat(f.fileno()).st_size
        if size < HEADER.size:
            raise _fail(name, f"not a nextword model (only {size} bytes)")
        mm = mmap.mmap(f.fileno(), 0, access=mmap.ACCESS_READ)
    try:
        return _parse(name, mm, size, verify)
    except ModelFormatError:
        raise
    except (ValueError, TypeError, IndexError, KeyError, OverflowError, msgpack.UnpackException) as e:
        raise _fail(name, f"damaged model: {e}") from None


def _parse(name: str, mm: mmap.mmap, size: int, verify: bool) -> ModelArrays:
    buf = memoryview(mm)
    magic, major, minor, n_sec, file_size, table_crc, head_crc = HEADER.unpack_from(buf, 0)
    if magic != MAGIC:
        raise _fail(name, "not a nextword model (bad magic bytes)")
    if zlib.crc32(buf[: HEADER.size - 4]) != head_crc:
        raise _fail(name, "header checksum mismatch (damaged file)")
    if major != FORMAT_VERSION[0] or minor > MAX_MINOR:
        raise _fail(
            name,
            f"unsupported format version {major}.{minor} (this library reads {FORMAT_VERSION[0]}.0 to "
            f"{FORMAT_VERSION[0]}.2 and {FORMAT_VERSION[0]}.{NGRAM_MINOR} to {FORMAT_VERSION[0]}.{COMPACT_MINOR})",
        )
    if minor == 3:
        raise _fail(
            name,
            "format 1.3 (the first Kneser-Ney/trigram layout) is no longer read; retrain the model to write format 1.4",
        )
    if file_size != size:
        raise _fail(name, f"file is {size} bytes but its header says {file_size} (truncated or appended)")
    if not 1 <= n_sec <= MAX_SECTIONS:
        raise _fail(name, f"bad section count {n_sec}")
    table_end = HEADER.size + ENTRY.size * n_sec
    if table_end > size:
        raise _fail(name, "section table runs past the end of the file")
    table = buf[HEADER.size : table_end]
    if zlib.crc32(table) != table_crc:
        raise _fail(name, "section table checksum mismatch (damaged file)")
    sections: dict[bytes, tuple[int, int, int, int]] = {}
    prev_end = table_end
    for i in range(n_sec):
        tag, code, off, length, crc = ENTRY.unpack_from(table, i * ENTRY.size)
        label = tag.decode("ascii", "replace")
        if tag in sections:
            raise _fail(name, f"section {label} appears twice")
        if code not in _DTYPES:
            raise _fail(name, f"section {label} has unknown element type {code}")
        if off % ALIGN or off < prev_end or off + length > size:
            raise _fail(name, f"section {label} has bad offset {off} or length {length}")
        dt = _DTYPES[code]
        item = 1 if dt is None else dt.itemsize
        if length % item:
            raise _fail(name, f"section {label} length {length} is not a multiple of {item}")
        if any(buf[prev_end:off]):
            raise _fail(name, f"non-zero padding before section {label}")
        prev_end = off + length
        sections[tag] = (code, off, length, crc)
    if -prev_end % ALIGN != size - prev_end or any(buf[prev_end:size]):
        raise _fail(name, "unexpected bytes after the last section")
    compact = minor == COMPACT_MINOR
    required = [t for t in _SECTIONS if not (compact and t in _COMPACT_DROPS)] + (list(_COMPACT_BASE) if compact else [])
    missing = [t.decode() for t in required if t not in sections]
    if minor < 3 and (b"HIST" in sections) != (minor == 2):
        raise _fail(name, "section HIST must be present exactly in format 1.2 (pruned) files")
    if minor < 3 and any(t in sections for t in _OPTIONAL if t != b"HIST"):
        raise _fail(name, f"format {major}.{minor} files have no Kneser-Ney or trigram sections")
    if missing:
        raise _fail(name, f"missing sections {', '.join(missing)}")
    optional = [t for t in _OPTIONAL if t in sections and not (compact and t in _COMPACT_BASE)]
    small = [t for t in [*optional, *(_COMPACT_BASE if compact else ())] if verify or t in _OPTIONAL_CHECKED_ON_LOAD]
    for tag in [*(t for t in (_SECTIONS if verify else _CHECKED_ON_LOAD) if t in sections), *small]:
        code, off, length, crc = sections[tag]
        if zlib.crc32(buf[off : off + length]) != crc:
            raise _fail(name, f"section {tag.decode()} checksum mismatch (damaged file)")

    code, off, length, _ = sections[b"META"]
    if length > MAX_META_BYTES:
        raise _fail(name, f"metadata of {length} bytes is too large")
    meta = msgpack.unpackb(bytes(buf[off : off + length]), raw=False, strict_map_key=True)
    meta = _check_meta(name, meta, size)
    n = meta["n_words"]
    idt = _id_dtype(n)
    _check_model_kind(name, meta, minor, set(sections))

    arrays: dict[str, np.ndarray] = {}
    raw: dict[str, memoryview] = {}
    for tag, kind in _SECTIONS.items():
        if compact and tag in _COMPACT_DROPS:
            continue
        code, off, length, _ = sections[tag]
        label = tag.decode()
        if kind == "raw":
            if code != 0:
                raise _fail(name, f"section {label} should hold raw bytes")
            raw[label] = buf[off : off + length]
            continue
        want: np.dtype
        if kind == "u2|u4":
            want = np.dtype("<u2") if code == 2 else np.dtype("<u4")
        else:
            want = idt if kind == "id" else np.dtype("<" + kind)
        if _DTYPES[code] != want:
            raise _fail(name, f"section {label} has element type {_DTYPES[code]}, expected {want}")
        arrays[label] = np.frombuffer(mm, dtype=want, count=length // want.itemsize, offset=off)

    for tag in [*optional, *(_COMPACT_BASE if compact else ())]:
        code, off, length, _ = sections[tag]
        kind = _OPTIONAL[tag]
        if kind == "u2|u4":
            want = np.dtype("<u2") if code == 2 else np.dtype("<u4")
        elif kind == "u4|u8":
            want = np.dtype("<u8") if code == 4 else np.dtype("<u4")
        else:
            want = idt if kind == "id" else np.dtype("<" + kind)
        if _DTYPES[code] != want:
            raise _fail(name, f"section {tag.decode()} has element type {_DTYPES[code]}, expected {want}")
        arrays[tag.decode()] = np.frombuffer(mm, dtype=want, count=length // want.itemsize, offset=off)
    efs = _expand_compact(name, meta, arrays, full=verify) if compact else {}
    views: dict[str, Any] = {k: efs[k] for k in ("HIST", "HN13") if k in efs}
    trie = marisa_trie.Trie()
    trie.map(raw["TRIE"])
    _check_arrays(name, meta, trie, arrays, raw, full=verify)
    succ2: BigramLists
    succ3: TrigramLists | None = None
    dropped3: SparseTable | None = None
    rows_mv = memoryview(np.ascontiguousarray(arrays["ROWS"], dtype=np.int64)).cast("B").cast("q")  # type: ignore[arg-type]
    if compact:
        succ2 = EFBigramLists(name, efs["SEF"], arrays["ROWS"], n + 2)
        if meta["order"] == 3:
            succ3 = EFTrigramLists(name, efs["TEF"], efs["TPT"], succ2, rows_mv, arrays["ALPH"])
            dropped3 = EFSparseTable(name, "sections TDIH/TDVH", efs["TDI"], efs["TDV"])
    else:
        succ2 = PlainBigramLists(arrays["SUCC"])
        if meta["order"] == 3:
            succ3 = PlainTrigramLists(name, arrays["TSUC"], arrays["TCTB"], EXACT.decode(name, arrays, CONTEXT_TAGS), succ2, rows_mv)
            dropped3 = PlainSparseTable(arrays["TDRI"], arrays["TDRV"])
    section_bytes = {tag.decode("ascii", "replace"): length for tag, (_, _, length, _) in sections.items()}
    return ModelArrays(name, (major, minor), meta, trie, arrays, raw, size, mm, succ2, succ3, section_bytes, dropped3, views)


def _expand_compact(name: str, meta: dict[str, Any], a: dict[str, np.ndarray], *, full: bool) -> dict[str, Any]:
    """Check a 1.6 file's Elias-Fano sequences (§7.18) and rebuild its vocabulary-sized arrays.

    On every load (O(chunks) and O(vocabulary)): every sequence's headers and stream;
    ROWS, UNIG, HIST, HN13 and HDRI/HDRV decoded into the arrays of a 1.4/1.5 file; IDTK
    and APOS computed as the inverses of TKID and ALPH (checked to be permutations by
    ``_check_arrays`` afterwards). The successor lists, trigram starts and TDRI/TDRV stay
    coded (returned, read by the query views). With ``full`` every sequence is decoded
    into the arrays of a 1.4/1.5 file (SUCC, TSUC, TLEN/TLEI/TLEV, TCTB, TDRI/TDRV), which
    ``_check_arrays`` then verifies as such.
    """
    n, b = meta["n_words"], meta["bigrams"]
    n_pos, n_hist = n + 2, n + 3
    idt = _id_dtype(n)
    # how many contexts of each level (bigram, trigram) have dropped mass: the sparse tables' lengths
    dropped = meta.get("dropped_contexts")
    want = meta["order"] - 1
    if not (isinstance(dropped, list) and len(dropped) == want and all(isinstance(x, int) and not isinstance(x, bool)
                                                                        for x in dropped)
            and 0 <= dropped[0] <= n_hist and (want == 1 or 0 <= dropped[1] <= b)):
        raise _fail(name, f"metadata field 'dropped_contexts' is invalid: {dropped!r}"[:200])

    def seq(tag: str, count: int, *, strict: bool, chunks: bool = True) -> ChunkedEF:
        head, stream = a.pop(tag + "H"), a.pop(tag + "B")
        ef_check_headers(name, f"sections {tag}H/{tag}B", head, stream, count, strict=strict, chunks=chunks or full)
        return ChunkedEF(name, f"sections {tag}H/{tag}B", head, stream, count, strict=strict)

    def counts(tag: str, count: int, *, positive: bool = False) -> np.ndarray:
        """Values stored as their prefix sums (count + 1 values from 0): the values, checked ≥ 0 (≥ 1) and ≤ 32 bits."""
        cum = seq(tag, count + 1, strict=positive).all()
        vals = np.diff(cum)
        if cum[0] != 0 or (count and (int(vals.min()) < (1 if positive else 0) or int(vals.max()) > _U32_MAX)):
            raise _fail(name, f"sections {tag}H/{tag}B do not hold prefix sums from 0 of {'positive ' if positive else ''}32-bit values")
        return vals

    rows_ef = seq("RWE", n_hist + 1, strict=False)
    rows = rows_ef.all()
    if rows[0] != 0 or rows[-1] != b or bool(np.any(rows[1:] < rows[:-1])):
        raise _fail(name, f"sections RWEH/RWEB: row starts are not increasing from 0 to {b}")
    a["ROWS"] = rows.astype(np.uint32) if b <= _U32_MAX else rows.astype(np.uint64)
    for label, inv, m in (("TKID", "IDTK", n), ("ALPH", "APOS", n_pos)):
        arr = a[label]
        if len(arr) != m or (m and int(arr.max()) >= m):
            raise _fail(name, f"section {label} is not a valid permutation")
        out = np.zeros(m, dtype=idt)
        out[arr.astype(np.int64)] = np.arange(m)
        if not np.array_equal(out[arr.astype(np.int64)], np.arange(m)):
            raise _fail(name, f"section {label} is not a valid permutation")
        a[inv] = out
    a["UNIG"] = counts("UNE", n_pos).astype(np.uint32)
    efs: dict[str, Any] = {}
    # the n-gram-sized sequences: their chunks' headers are checked when a query decodes them
    efs["SEF"] = seq("SEF", b, strict=True, chunks=False)
    if efs["SEF"].end() > n_hist * n_pos:
        raise _fail(name, "sections SEFH/SEFB: a successor past the last row")
    if "HSEH" in a:
        if full:
            a["HIST"] = counts("HSE", n_hist).astype(np.uint32)
        else:  # read per query (two reads of a cached chunk): opening stays fast
            efs["HIST"] = PrefixSums(name, "sections HSEH/HSEB", seq("HSE", n_hist + 1, strict=False))
            if efs["HIST"].first() != 0:
                raise _fail(name, "sections HSEH/HSEB do not hold prefix sums from 0")
        n_hdr = dropped[0]
        idx = seq("HDI", n_hdr, strict=True).all()
        if len(idx) and int(idx[-1]) >= n_hist:
            raise _fail(name, f"sections HDIH/HDIB: a history id not below {n_hist}")
        a["HDRI"] = idx.astype(idt)
        a["HDRV"] = counts("HDV", n_hdr, positive=True).astype(np.uint32)
    if "N1EH" in a and not full:
        n1v = PrefixSums(name, "sections N1EH/N1EB", seq("N1E", n_hist + 1, strict=False))
        n2v = PrefixSums(name, "sections N2EH/N2EB", seq("N2E", n_hist + 1, strict=False))
        efs["HN13"] = RowCounts(name, n1v, n2v, rows)
    elif "N1EH" in a:
        n1, n2 = counts("N1E", n_hist), counts("N2E", n_hist)
        n3 = np.diff(rows) - n1 - n2
        if bool(np.any(n3 < 0)):
            raise _fail(name, "sections N1EH/N2EH count more entries than a row has")
        a["HN13"] = np.column_stack([n1, n2, n3]).reshape(-1).astype(np.uint32)
    if meta["order"] == 3:
        t = meta["trigrams"]
        efs["TPT"] = seq("TPT", b + 1, strict=False, chunks=False)
        if efs["TPT"].first() != 0 or efs["TPT"].end() != t + 1:
            raise _fail(name, f"sections TPTH/TPTB do not run from 0 to {t}")
        efs["TEF"] = seq("TEF", t, strict=True, chunks=False)
        n_tdr = dropped[1]
        efs["TDI"] = seq("TDI", n_tdr, strict=True, chunks=False)
        efs["TDV"] = seq("TDV", n_tdr + 1, strict=True, chunks=False)
        if efs["TDI"].end() > b or efs["TDV"].first() != 0:
            raise _fail(name, "sections TDIH/TDVH do not index bigram entries, or their sums do not start at 0")
    if full:
        succ2 = EFBigramLists(name, efs["SEF"], rows, n_pos)
        a["SUCC"] = succ2.all().astype(idt)
        if meta["order"] == 3:
            rows_mv = memoryview(np.ascontiguousarray(rows, dtype=np.int64)).cast("B").cast("q")  # type: ignore[arg-type]
            succ3 = EFTrigramLists(name, efs["TEF"], efs["TPT"], succ2, rows_mv, a["ALPH"])
            lengths = succ3.lengths()
            a["TSUC"] = succ3.all().astype(idt)
            for tag, _, enc in EXACT.encode(CONTEXT_TAGS, lengths):
                a[tag.decode()] = np.asarray(enc)
            starts = np.zeros(b + 1, dtype=np.int64)
            np.cumsum(lengths, out=starts[1:])
            a["TCTB"] = starts[: b + 1 : CTX_BLOCK].astype(np.uint32)
            idx, val = EFSparseTable(name, "sections TDIH/TDVH", efs["TDI"], efs["TDV"]).all()
            if len(val) and int(val.max()) > _U32_MAX:
                raise _fail(name, "sections TDVH/TDVB hold a value above 32 bits")
            a["TDRI"], a["TDRV"] = idx.astype(np.uint32), val.astype(np.uint32)
    return efs



def _check_meta(name: str, meta: Any, size: int) -> dict[str, Any]:
    if not isinstance(meta, dict):
        raise _fail(name, "metadata is not a map")
    fields: dict[str, Any] = meta

    def need(key: str, typ: type | tuple[type, ...], lo: float, hi: float) -> Any:
        v = fields.get(key)
        if isinstance(v, bool) or not isinstance(v, typ) or not lo <= float(cast(Any, v)) <= hi:
            raise _fail(name, f"metadata field {key!r} is invalid: {v!r}")
        return v

    need("n_words", int, 1, min(size, 0xFFFFFFF0))
    lam = need("lambda", (float, int), 0.0, 1.0)
    meta["lambda"] = float(lam)
    need("total", int, 1, 1 << 53)
    need("bigrams", int, 0, size)
    need("skyband_k", int, 1, 4096)
    need("skyband_min", int, 0, 1 << 32)
    need("max_key_chars", int, 1, 1 << 20)
    rules = meta.setdefault("text_rules", 1)  # absent: version 1, the rules every file so far was counted with
    if isinstance(rules, bool) or not isinstance(rules, int) or rules < 1:
        raise _fail(name, f"metadata field 'text_rules' is invalid: {rules!r}"[:200])
    if rules > TEXT_RULES:
        raise _fail(name, f"counted with text rules version {rules}; this nextword has version {TEXT_RULES}")
    if meta.get("topk_fanout") != TOPK_FANOUT:
        raise _fail(name, f"metadata field 'topk_fanout' is invalid: {meta.get('topk_fanout')!r}")
    if not isinstance(meta.get("stats", {}), dict):
        raise _fail(name, "metadata field 'stats' is invalid")
    buckets = meta.get("lambda_buckets")
    if buckets is not None:
        bounds = buckets.get("bounds") if isinstance(buckets, dict) else None
        lams = buckets.get("lambdas") if isinstance(buckets, dict) else None
        ok = (
            isinstance(bounds, list)
            and isinstance(lams, list)
            and len(lams) == len(bounds) + 1
            and len(bounds) <= 64
            and all(isinstance(b, int) and not isinstance(b, bool) and b >= 1 for b in bounds)
            and all(a < b for a, b in zip(bounds, bounds[1:]))
            and all(isinstance(x, (int, float)) and not isinstance(x, bool) and 0.0 <= x <= 1.0 for x in lams)
        )
        if not ok:
            raise _fail(name, f"metadata field 'lambda_buckets' is invalid: {buckets!r}"[:300])
    return meta


def _check_model_kind(name: str, meta: dict[str, Any], minor: int, tags: set[bytes]) -> None:
    """META's estimator fields (format 1.4) and the optional sections they call for."""
    if minor < 3:
        if meta.get("estimator", "jm") != "jm" or meta.get("order", 2) != 2 or "discounts" in meta or "lambda3" in meta:
            raise _fail(name, f"format 1.{minor} files hold Jelinek-Mercer bigram models only")
        if "codec" in meta:
            raise _fail(name, f"format 1.{minor} files have no 'codec' field (their values are exact)")
        if "successors" in meta:
            raise _fail(name, f"metadata field 'successors' belongs to format 1.{COMPACT_MINOR} files exactly")
        meta["estimator"], meta["order"] = "jm", 2
        return
    codec = codec_named(name, meta.get("codec"))
    compact = minor == COMPACT_MINOR
    layout = meta.get("successors")
    if compact != (layout is not None):
        raise _fail(name, f"metadata field 'successors' belongs to format 1.{COMPACT_MINOR} files exactly")
    if compact and layout != SUCCESSORS_META:
        raise _fail(name, f"unknown successor layout {layout!r} (this library reads {SUCCESSORS_META!r})"[:300])
    if codec.version == 2 and not compact:
        raise _fail(name, f"codec {codec.name!r} version 2 belongs to format 1.{COMPACT_MINOR} files, not 1.{minor}")
    if not compact and (codec.name != EXACT.name) != (minor == QUANT_MINOR):
        raise _fail(name, f"format 1.{minor} files do not use codec {codec.name!r} (1.{NGRAM_MINOR}: exact values, 1.{QUANT_MINOR}: quantised)")
    est, order = meta.get("estimator"), meta.get("order")
    if est not in ESTIMATORS:
        raise _fail(name, f"metadata field 'estimator' is invalid: {est!r}"[:200])
    if isinstance(order, bool) or order not in ORDERS:
        raise _fail(name, f"metadata field 'order' is invalid: {order!r}"[:200])
    if est == "jm" and order == 2 and minor not in (QUANT_MINOR, COMPACT_MINOR):
        raise _fail(name, f"a Jelinek-Mercer bigram model is a format 1.0-1.2 or 1.{QUANT_MINOR} file, not 1.{minor}")
    if est == "kn":
        ds = meta.get("discounts")
        ok = isinstance(ds, list) and len(ds) == order and all(
            isinstance(d, list) and len(d) == 3
            and all(isinstance(x, float) and 0.0 < x <= j for j, x in enumerate(d, 1)) for d in ds
        )
        if not ok:
            raise _fail(name, f"metadata field 'discounts' is invalid: {ds!r}"[:300])
        for m in range(2, order + 1):  # the levels with skybands need it (§7.13, §7.16)
            d1, d2, d3 = cast(list, ds)[m - 1]
            if not (1 - d1 < 2 - d2 < 3 - d3):
                raise _fail(name, f"discounts of order {m} do not keep 1-D1 < 2-D2 < 3-D3")
        notes = meta.get("discount_notes", {})
        if not isinstance(notes, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in notes.items()):
            raise _fail(name, "metadata field 'discount_notes' is invalid")
    elif order == 3:
        lam3 = meta.get("lambda3")
        if isinstance(lam3, bool) or not isinstance(lam3, (int, float)) or not 0.0 <= float(lam3) <= 1.0:
            raise _fail(name, f"metadata field 'lambda3' is invalid: {lam3!r}"[:200])
        meta["lambda3"] = float(lam3)
    if compact:
        want = set(_COMPACT_NGRAM_BASE) | (set(_COMPACT_KN) if est == "kn" else set())
        want |= (set(_TRIGRAM) - set(_PLAIN_TRIGRAM_ONLY)) | set(_COMPACT_TRIGRAM) if order == 3 else set()
        have = tags & (set(_OPTIONAL) - set(_COMPACT_BASE))
    else:
        want = set(_NGRAM_BASE) | ({b"HN13"} if est == "kn" else set()) | (set(_TRIGRAM) if order == 3 else set())
        have = tags & set(_OPTIONAL)
    if have != want:
        extra = sorted(t.decode() for t in have - want)
        lost = sorted(t.decode() for t in want - have)
        raise _fail(name, f"a {est} order-{order} file: missing sections {lost}, unexpected sections {extra}")
    if order == 3:
        for key in ("trigrams", "trigram_contexts"):
            v = meta.get(key)
            if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v <= _U32_MAX:
                raise _fail(name, f"metadata field {key!r} is invalid: {v!r}"[:200])
        if meta.get("trigram_summary_min") != SUMMARY_MIN:
            raise _fail(name, f"metadata field 'trigram_summary_min' is invalid: {meta.get('trigram_summary_min')!r}"[:200])
        # files written before the field existed used skyband_min for the trigram rows too
        tmin = meta.setdefault("trigram_skyband_min", meta["skyband_min"])
        if isinstance(tmin, bool) or not isinstance(tmin, int) or not 0 <= tmin <= _U32_MAX:
            raise _fail(name, f"metadata field 'trigram_skyband_min' is invalid: {tmin!r}"[:200])


def _sorted_sparse(name: str, label: str, idx: np.ndarray, val: np.ndarray, end: int) -> None:
    """A sparse (index, value) table: as long as each other, indices increasing below ``end``, values ≥ 1."""
    if len(idx) != len(val):
        raise _fail(name, f"section {label}: index and value tables differ in length")
    if len(idx) and (int(idx[-1]) >= end or int(val.min()) < 1 or bool(np.any(idx[1:] <= idx[:-1]))):
        raise _fail(name, f"section {label}: indices not increasing below {end}, or a zero value")


def _check_ngram_arrays(name: str, meta: dict[str, Any], a: dict[str, np.ndarray], *, keys: list[str] | None) -> None:
    """Lengths, offsets and ids of the Kneser-Ney and trigram sections (format 1.4).

    Always (cost of the vocabulary, the sparse tables and the first/last entries, so that
    opening stays fast): every length against META, TCTB increasing from 0, the last
    bigram entry's trigrams ending at the last trigram, the sparse tables sorted and in range.
    Queries check every other value where they read it. With ``full``: the orderings,
    totals, n₁/n₂/n₃₊, summaries and skybands recomputed from the stored values (``keys``:
    the vocabulary in alphabetical order, given only for that).
    """
    n = meta["n_words"]
    n_pos, n_hist = n + 2, n + 3
    kn = meta["estimator"] == "kn"
    if "HIST" in a and len(a["HIST"]) != n_hist:
        raise _fail(name, f"section HIST holds {len(a['HIST'])} entries, expected {n_hist}")
    if kn and "HN13" in a and len(a["HN13"]) != 3 * n_hist:
        raise _fail(name, f"section HN13 holds {len(a['HN13'])} entries, expected {3 * n_hist}")
    _sorted_sparse(name, "HDRI/HDRV", a["HDRI"], a["HDRV"], n_hist)
    # (a 1.6 file opened without verify reads HIST per query, which compares each dropped mass with its total)
    if "HIST" in a and len(a["HDRI"]) and bool(np.any(a["HDRV"] > a["HIST"][a["HDRI"]])):
        raise _fail(name, "section HDRV holds dropped mass above its context total")
    codec = codec_named(name, meta["codec"])
    if meta["order"] == 3:
        t, j, b = meta["trigrams"], meta["trigram_contexts"], meta["bigrams"]
        codec.check(name, a, TRIGRAM_TAGS, t)
        plain = "TLEN" in a  # absent: a 1.6 file opened without verify (its sequences checked by _expand_compact)
        if plain:
            EXACT.check(name, a, CONTEXT_TAGS, b)
        nseg, K = len(a["TSGS"]), meta["skyband_k"]
        expected = {
            **({"TCTB": b // CTX_BLOCK + 1, "TSUC": t} if plain else {}),
            **({"TDRV": len(a["TDRI"])} if "TDRI" in a else {}),
            "TLNV": 4 * len(a["TLNI"]), "TSGE": nseg, "TSKP": nseg + 1, "TSKC": nseg * K,
        }  # fmt: skip
        for label, want in expected.items():
            if len(a[label]) != want:
                raise _fail(name, f"section {label} holds {len(a[label])} entries, expected {want}")
        if plain:
            tctb = a["TCTB"]
            last = (b // CTX_BLOCK) * CTX_BLOCK  # the end: the last block's base + its lengths (at most 15 reads)
            tail = EXACT.decode(name, a, CONTEXT_TAGS).slice(last, b)
            if tctb[0] != 0 or np.any(tctb[1:] < tctb[:-1]) or int(tctb[-1]) + sum(tail) != t:
                raise _fail(name, f"sections TCTB/TLEN do not run from 0 to {t}")
        _sorted_sparse(name, "TLNI/TLNV", a["TLNI"], np.ones(len(a["TLNI"]), np.int64), b)
        if "TDRI" in a:  # absent: a 1.6 file opened without verify (its sequences checked by _expand_compact)
            _sorted_sparse(name, "TDRI/TDRV", a["TDRI"], a["TDRV"], b)
        if a["TSKP"][0] != 0 or int(a["TSKP"][-1]) != len(a["TSKI"]):
            raise _fail(name, "section TSKP does not run from 0 to the end of TSKI")
    if keys is None:
        return
    rows = a["ROWS"].astype(np.int64)
    row_of = np.repeat(np.arange(n_hist), np.diff(rows))
    cnts = level_values(name, meta, a, BIGRAM_TAGS, meta["bigrams"])
    dropped2 = np.zeros(n_hist, dtype=np.int64)
    dropped2[a["HDRI"].astype(np.int64)] = a["HDRV"]
    if not np.array_equal(np.bincount(row_of, weights=cnts, minlength=n_hist).astype(np.int64) + dropped2, a["HIST"]):
        raise _fail(name, "section HIST is not the row sums plus the dropped mass")
    n123_2 = _n123(row_of, cnts, n_hist)
    if kn and not np.array_equal(n123_2.reshape(-1), a["HN13"]):
        raise _fail(name, "section HN13 disagrees with the bigram values")
    if meta["order"] == 3:
        t, j, b = meta["trigrams"], meta["trigram_contexts"], meta["bigrams"]
        codec.check_full(name, a, TRIGRAM_TAGS)
        small, esc = a["TLEN"], a["TLEI"]
        if len(esc) > 1 and bool(np.any(esc[1:] <= esc[:-1])) or not np.array_equal(np.flatnonzero(small == COUNT_ESCAPE), esc):
            raise _fail(name, "sections TLEN and TLEI disagree")
        lengths = EXACT.decode(name, a, CONTEXT_TAGS).all()
        all_starts = np.zeros(b + 1, dtype=np.int64)
        np.cumsum(lengths, out=all_starts[1:])
        if all_starts[-1] != t or not np.array_equal(a["TCTB"].astype(np.int64), all_starts[: b + 1 : CTX_BLOCK]):
            raise _fail(name, "section TCTB does not hold the block bases of TLEN")
        big = np.flatnonzero(lengths)
        if len(big) != j:
            raise _fail(name, f"section TLEN has {len(big)} trigram contexts, metadata says {j}")
        starts = np.concatenate([all_starts[big], [t]])
        ctx_v = a["ALPH"].astype(np.int64)[a["SUCC"].astype(np.int64)[big]]
        if j and (int(ctx_v.max()) >= n_pos or bool(np.any(ctx_v == n))):
            raise _fail(name, "section TLEN gives a trigram context ending in </s>")
        tsuc = a["TSUC"].astype(np.int64)
        if t and int(tsuc.max()) >= n_pos:
            raise _fail(name, "section TSUC holds a position out of range")
        owner = np.repeat(np.arange(j), np.diff(starts))
        skey = owner * n_pos + tsuc
        if len(skey) > 1 and np.any(skey[1:] <= skey[:-1]):
            raise _fail(name, "section TSUC is not strictly increasing within each context")
        if j and int(a["HIST"][ctx_v].min()) == 0:
            raise _fail(name, "a trigram context whose last word has no bigram total")
        val = codec.decode(name, a, TRIGRAM_TAGS, t).all()
        sums = np.bincount(owner, weights=val, minlength=j).astype(np.int64)
        n123_3 = _n123(owner, val, j)
        long_ctx = np.flatnonzero(np.diff(starts) > SUMMARY_MIN)
        if not np.array_equal(a["TLNI"], big[long_ctx]) or not np.array_equal(
            np.column_stack([sums[long_ctx], n123_3[long_ctx]]).reshape(-1), a["TLNV"]
        ):
            raise _fail(name, "sections TLNI/TLNV are not the summaries of the long trigram contexts")
        dropped3 = np.zeros(b, dtype=np.int64)
        dropped3[a["TDRI"].astype(np.int64)] = a["TDRV"]
        not_ctx = np.ones(b, dtype=bool)
        not_ctx[big] = False
        if bool(np.any(dropped3[not_ctx])):
            raise _fail(name, "section TDRI names a bigram entry that is no trigram context")
        if int((sums + dropped3[big]).max(initial=0)) > _U32_MAX:
            raise _fail(name, "a trigram context total above 32 bits")

        if kn:
            floor = unigram_floor(a["UNIG"], meta["discounts"][0], meta["total"])
        else:
            floor = a["UNIG"].astype(np.int64) / meta["total"]
        lower = trigram_lower_scores(
            kn, meta["discounts"][1] if kn else meta["lambda"], floor, rows, a["SUCC"], cnts,
            a["HIST"].astype(np.int64), dropped2, n123_2, np.repeat(ctx_v, np.diff(starts)), tsuc, a["ALPH"].astype(np.int64),
        )  # fmt: skip
        got = trigram_bands(
            starts, tsuc, a["ALPH"].astype(np.int64)[tsuc.astype(np.int64)], val, lower, keys, n, meta["skyband_k"],
            meta["trigram_skyband_min"],
        )
        for label, arr in zip(("TSGS", "TSGE", "TSKP", "TSKI", "TSKC"), got):
            if not np.array_equal(arr, a[label]):
                raise _fail(name, f"section {label} is not the skyband data of the trigram rows")


def _check_arrays(
    name: str,
    meta: dict[str, Any],
    trie: marisa_trie.Trie,
    a: dict[str, np.ndarray],
    raw: dict[str, memoryview],
    *,
    full: bool,
) -> None:
    n = meta["n_words"]
    n_pos, n_hist = n + 2, n + 3
    b = meta["bigrams"]
    expected = {
        "TKID": n,
        "IDTK": n,
        "ALPH": n_pos,
        "APOS": n_pos,
        "KEY4": n,
        "TOPK": sum(topk_levels(n)) * TOPK_FANOUT,
        "UNIG": n_pos,
        "ROWS": n_hist + 1,
        **({"SUCC": b} if "SUCC" in a else {}),
        "SEGE": len(a["SEGS"]),
        "SKYP": len(a["SEGS"]) + 1,
        "SKYC": len(a["SEGS"]) * meta["skyband_k"],
        **({"HIST": n_hist} if "HIST" in a else {}),
        "DISO": len(a["DISI"]) + 1,
    }
    for label, want in expected.items():
        if len(a[label]) != want:
            raise _fail(name, f"section {label} holds {len(a[label])} entries, expected {want}")
    codec = codec_named(name, meta["codec"]) if "codec" in meta else EXACT
    codec.check(name, a, BIGRAM_TAGS, b)
    if len(trie) != n:
        raise _fail(name, f"trie holds {len(trie)} words, metadata says {n}")

    def perm(label: str, arr: np.ndarray, inv: np.ndarray, m: int) -> None:
        if arr.max(initial=0) >= m or inv.max(initial=0) >= m or not np.array_equal(inv[arr], np.arange(m)):
            raise _fail(name, f"section {label} is not a valid permutation")

    perm("TKID", a["TKID"], a["IDTK"], n)
    perm("ALPH", a["ALPH"], a["APOS"], n_pos)
    if a["ALPH"][n] != n or a["ALPH"][n + 1] != n + 1:
        raise _fail(name, "section ALPH does not end with the reserved symbols")
    if a["UNIG"].sum(dtype=np.int64) != meta["total"]:
        raise _fail(name, "unigram counts do not add up to the stored total")
    for label, end in (("ROWS", b), ("DISO", len(raw["DISB"]))):
        arr = a[label]
        if arr[0] != 0 or arr[-1] != end or np.any(arr[1:] < arr[:-1]):
            raise _fail(name, f"section {label} offsets are not increasing from 0 to {end}")
    disi = a["DISI"]
    if len(disi) and (disi[-1] >= n or np.any(disi[1:] <= disi[:-1])):
        raise _fail(name, "section DISI is not an increasing list of word ids")
    if codec is EXACT and ("HIST" in a or "successors" not in meta):  # (1.6 without verify: the queries compare)
        _check_escaped_counts(name, a, n, b)
    ngram = meta["estimator"] != "jm" or meta["order"] != 2 or codec is not EXACT or "successors" in meta
    if ngram:
        _check_ngram_arrays(name, meta, a, keys=None)
    if not full:
        return

    rows, succ, cnts = a["ROWS"].astype(np.int64), a["SUCC"], a["CNTS"]
    if b and succ.max() >= n_pos:
        raise _fail(name, "section SUCC holds an id out of range")
    row_of = np.repeat(np.arange(n_hist), np.diff(rows))
    key = row_of * n_pos + succ
    if b > 1 and np.any(key[1:] <= key[:-1]):
        raise _fail(name, "section SUCC rows are not strictly increasing")
    if b and (rows[n + 1] - rows[n]) != 0:
        raise _fail(name, "</s> has successors")
    if codec is EXACT:
        if b and cnts.min() == 0:
            raise _fail(name, "section CNTS holds a zero count")
        bigi, bigc = a["BIGI"].astype(np.int64), a["BIGC"].astype(np.int64)
        if len(bigi) and (bigi.max() >= b or np.any(bigi[1:] <= bigi[:-1]) or bigc.min() < COUNT_ESCAPE):
            raise _fail(name, "sections BIGI/BIGC are inconsistent")
        if not np.array_equal(np.flatnonzero(cnts == COUNT_ESCAPE), bigi):
            raise _fail(name, "sections CNTS and BIGI disagree")
    else:
        codec.check_full(name, a, BIGRAM_TAGS)
    full_counts = level_values(name, meta, a, BIGRAM_TAGS, b)
    hist = a["HIST"] if "HIST" in a else history_counts(a["UNIG"], n)
    # n-gram files: HIST = row sums + dropped mass, checked with the other 1.4 sections
    if not ngram and not np.array_equal(np.bincount(row_of, weights=full_counts, minlength=n_hist), hist):
        raise _fail(name, "row counts disagree with the history counts")
    col = np.bincount(a["ALPH"][succ], weights=full_counts, minlength=n_pos)
    if meta["estimator"] == "kn":
        # Kneser-Ney: a word's unigram value is its number of distinct predecessors (§7.13),
        # at least the rows still holding it when the bigram level is pruned: dropped mass
        # stored, or a history with no row at all (a context pruned whole; in a trained file
        # every word and <s> has a row, and <unk> when it occurs, as each is followed by a
        # token) — h-prune's change
        cont = np.bincount(a["ALPH"][succ], minlength=n_pos)
        empty = np.diff(rows) == 0
        pruned2 = len(a["HDRI"]) > 0 or bool(np.any(empty[:n])) or bool(empty[n + 2]) or (bool(empty[n + 1]) and int(a["UNIG"][n + 1]) > 0)
        if not (np.array_equal(cont, a["UNIG"]) or (pruned2 and not np.any(cont > a["UNIG"]))):
            raise _fail(name, "section UNIG disagrees with the bigram rows (continuation counts)")
    elif "HIST" not in a and not np.array_equal(col, a["UNIG"]):
        raise _fail(name, "section UNIG disagrees with the bigram counts")
    elif "HIST" in a and codec is EXACT and np.any(col > a["UNIG"]):
        raise _fail(name, "a pruned model holds more pair counts than unigram counts")
    skyp = a["SKYP"].astype(np.int64)
    if skyp[0] != 0 or skyp[-1] != len(a["SKYI"]) or np.any(skyp[1:] < skyp[:-1]):
        raise _fail(name, "section SKYP offsets are not increasing from 0 to the end of SKYI")
    seg_s, seg_e = a["SEGS"].astype(np.int64), a["SEGE"].astype(np.int64)
    if len(seg_s):
        seg_key = seg_s * (b + 1) + seg_e
        row_s = rows[np.searchsorted(rows, seg_s, side="right") - 1]
        row_e = rows[np.searchsorted(rows, seg_s, side="right")]
        if np.any(seg_key[1:] <= seg_key[:-1]) or np.any(seg_e <= seg_s) or np.any(seg_e > row_e) or np.any(seg_s < row_s):
            raise _fail(name, "sections SEGS/SEGE are not sorted ranges inside rows")
        seg_len = np.repeat(seg_e - seg_s, np.diff(skyp))
        if np.any(a["SKYI"].astype(np.int64) >= seg_len):
            raise _fail(name, "section SKYI points outside its segment")
    for i in range(n):
        if trie.restore_key(int(a["IDTK"][i])) is None:
            raise _fail(name, "trie is inconsistent")
    keys = [trie.restore_key(int(a["IDTK"][w])) for w in a["ALPH"][:n]]
    if any(keys[i] >= keys[i + 1] for i in range(len(keys) - 1)):
        raise _fail(name, "section ALPH is not in alphabetical order")
    if a["KEY4"].tolist() != [key_head(k) for k in keys]:
        raise _fail(name, "section KEY4 disagrees with the keys")
    try:
        bytes(raw["DISB"]).decode("utf-8")
    except UnicodeDecodeError:
        raise _fail(name, "section DISB is not UTF-8") from None
    if ngram:
        _check_ngram_arrays(name, meta, a, keys=keys)
    _check_derived(name, meta, a, keys, full_counts)


def level_values(name: str, meta: dict[str, Any], a: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes], n: int) -> np.ndarray:
    """Every decoded value of one level (int64), through the file's codec (exact before 1.4)."""
    codec = codec_named(name, meta["codec"]) if "codec" in meta else EXACT
    return np.asarray(codec.decode(name, a, tags, n).all(), dtype=np.int64)


def _check_escaped_counts(name: str, a: dict[str, np.ndarray], n: int, b: int) -> None:
    """Every escaped pair count (>= 255) is at most its row's history count c(v).

    A valid file has c(v,w) <= c(v) (a row's counts sum to c(v)); a larger count would
    give P(w | v) above 1. Escaped counts are the only ones that can be far above any
    history count, and they are few (one per pair seen 255 times or more), so this costs
    O(escapes · log rows), not O(pairs), and runs on every load. One-byte counts
    (1 … 254) are bounded where a query reads them (``Model._over``), so that no
    probability is ever above 1 without reading every pair on load.
    """
    bigi = a["BIGI"]
    if not len(bigi):
        return
    if int(bigi.max()) >= b:
        raise _fail(name, "section BIGI points past the last pair")
    hist = a["HIST"] if "HIST" in a else history_counts(a["UNIG"], n)
    row_of_escape = np.searchsorted(a["ROWS"], bigi, side="right") - 1
    if np.any(a["BIGC"] > hist[row_of_escape]):
        raise _fail(name, "section BIGC holds a pair count above its history count")


def _check_derived(name: str, meta: dict[str, Any], a: dict[str, np.ndarray], keys: list[str], counts: np.ndarray) -> None:
    """Recompute every structure the exact ranking relies on and compare (verify=True only)."""
    n = meta["n_words"]
    unig = a["UNIG"][:n].astype(np.int64)
    key_of_id = [""] * n
    for pos, wid in enumerate(a["ALPH"][:n].tolist()):
        key_of_id[wid] = keys[pos]
    if meta["estimator"] == "kn":

        # Kneser-Ney: ids rank by the floor P1 itself (§7.13), compared as the stored float64 values
        fl = unigram_floor(a["UNIG"], meta["discounts"][0], meta["total"])[:n].tolist()
        if any((fl[i], key_of_id[i + 1]) <= (fl[i + 1], key_of_id[i]) for i in range(n - 1)):
            raise _fail(name, "word ids are not in (floor descending, key ascending) order")
    elif any((unig[i], key_of_id[i + 1]) <= (unig[i + 1], key_of_id[i]) for i in range(n - 1)):
        raise _fail(name, "word ids are not in (count descending, key ascending) order")
    alpha_words = a["ALPH"][:n].astype(np.int64)
    pad = int(np.iinfo(a["TOPK"].dtype).max)
    size, parts = TOPK_FANOUT, []
    for nb in topk_levels(n):
        padded = np.full(nb * size, pad, dtype=np.int64)
        padded[:n] = alpha_words
        parts.append(np.sort(padded.reshape(nb, size), axis=1)[:, :TOPK_FANOUT].reshape(-1))
        size *= TOPK_FANOUT
    if not np.array_equal(np.concatenate(parts), a["TOPK"]):
        raise _fail(name, "section TOPK disagrees with ALPH")
    rows = a["ROWS"].astype(np.int64)
    succ = a["SUCC"].astype(np.int64)
    long_rows = np.flatnonzero(np.diff(rows) > meta["skyband_min"])
    exp_s, exp_e = _prefix_segments(
        _prefix_groups(keys, meta["skyband_min"]),
        succ,
        rows[long_rows],
        _row_word_ends(rows, succ, long_rows, n),
        meta["skyband_min"],
    )
    stored = list(zip(a["SEGS"].tolist(), a["SEGE"].tolist()))
    if list(zip(exp_s.tolist(), exp_e.tolist())) != stored:
        raise _fail(name, "sections SEGS/SEGE are not the prefix segments of the rows")
    skyp, skyi = a["SKYP"].astype(np.int64), a["SKYI"].astype(np.int64)
    alph = a["ALPH"].astype(np.int64)
    for i, (s, e) in enumerate(stored):
        K = meta["skyband_k"]
        band, cum = _skyband(alph[succ[s:e]], counts[s:e], K)
        if not np.array_equal(band, skyi[skyp[i] : skyp[i + 1]]) or not np.array_equal(cum, a["SKYC"][i * K : (i + 1) * K]):
            raise _fail(name, f"sections SKYI/SKYC: segment {i} does not hold its skyband")
