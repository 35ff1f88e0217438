"""docs/FORMAT.md is a correct and current description of the model file.

``NwmReader`` below is a second reader of ``.nwm`` files, written from docs/FORMAT.md
alone. It uses only ``struct``, ``zlib``, ``msgpack``, ``marisa_trie`` and ``numpy``;
it imports nothing from ``nextword.store`` or ``nextword.model``. The tests train
models through the public API, read them with this reader, and require the same
probabilities, rankings and display spellings as ``nextword.load(...)``. A last test
retrains the worked example of FORMAT.md §10 and compares it with the bytes and arrays
quoted there, so the document fails CI when the format changes.

Format 1.6 (§7.18) is read by the same classes: ``ef_decode`` decodes a chunked
Elias-Fano sequence bit by bit from the text of §7.18 (it does not use
``nextword.succinct``), and the reader rebuilds the arrays of the plain layout from it.
The 1.6 tests compare with the library's encoder (a property test), with the plain file
of the same model, with the worked example of §10.9, and damage files for each check §8
lists for 1.6 (``write_file`` lays a file out again by §11 with its CRCs right).

The main training corpus is real text: the first lines of the Python documentation
topics in the standard library (``pydoc_data.topics``) and the "I am Sam" sentences of
Jurafsky & Martin, *Speech and Language Processing* (3rd ed. draft, ch. 3), repeated so
that some pair counts need the count escape. Expected values come from brute-force
counting of the same text in this file (cut into sentences and keys by
``nextword.text``, the documented tokenisation rules), or are worked out by hand from the
Sam sentences.
"""

from __future__ import annotations

import bisect
import itertools
import os
import random
import re
import struct
import zlib
from collections import Counter, defaultdict
from dataclasses import dataclass
from collections.abc import Callable
from pathlib import Path
from pydoc_data.topics import topics  # standard library: the text of help() topics

import marisa_trie
import msgpack
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
from nextword.text import fold, sentences

DOC = Path(__file__).resolve().parent.parent / "docs" / "FORMAT.md"

# ----------------------------------------------------------------------------- the reader
# Everything in this block is transcribed from docs/FORMAT.md; section numbers refer to it.

MAGIC = b"\x89NWM\r\n\x1a\n"  # §3
HEADER = struct.Struct("<8sHHIQII")  # §3: 32 bytes
ENTRY = struct.Struct("<4sB3sQQI4s")  # §4: 32 bytes, reserved fields kept to check them
F = 64  # §7.5
ESCAPE = 255  # §7.8
ELEMENTS = {0: None, 1: np.dtype("<u1"), 2: np.dtype("<u2"), 3: np.dtype("<u4"), 4: np.dtype("<u8")}  # §5
# §7: tag -> element type, in the order nextword writes them
LAYOUT = {
    "META": "raw", "TRIE": "raw", "TKID": "id", "IDTK": "id", "ALPH": "id", "APOS": "id",
    "KEY4": "u32", "TOPK": "id", "UNIG": "u32", "ROWS": "u32", "SUCC": "id",
    "CNTS": "u8", "BIGI": "u32", "BIGC": "u32", "SEGS": "u32", "SEGE": "u32", "SKYP": "u32",
    "SKYI": "u16|u32", "SKYC": "u16|u32", "DISI": "id", "DISO": "u32", "DISB": "raw",
}  # fmt: skip
# §8 item 6: not checksummed on every load by the Python reader
BIGRAM_SIZED = ("SUCC", "CNTS", "BIGI", "BIGC", "SEGS", "SEGE", "SKYP", "SKYI", "SKYC")
CODE_OF = {"raw": 0, "u8": 1, "u16": 2, "u32": 3, "u64": 4}
# §7.18: a 1.6 file drops the inverse permutations, the plain bigram lists and UNIG, and
# holds chunked Elias-Fano sequences instead (two sections each: header u32 or u64, stream u8)
DROPPED_16 = ("IDTK", "APOS", "ROWS", "SUCC", "UNIG")
LAYOUT_16 = {**{t: k for t, k in LAYOUT.items() if t not in DROPPED_16},
             "RWEH": "u32|u64", "RWEB": "u8", "SEFH": "u32|u64", "SEFB": "u8",
             "UNEH": "u32|u64", "UNEB": "u8"}  # fmt: skip
SUCCESSORS_16 = {"name": "ef", "version": 1}  # §7.18: META.successors
EF_CHUNK = 64  # §7.18: values per chunk
EF_PAD = 8  # §7.18: zero bytes after the stream


class FormatError(Exception):
    """The independent reader rejected a file."""


def ef_low_width(r: int, m: int) -> int:
    """§7.18: ℓ = ⌊log₂ ⌊r / m⌋⌋ when r ≥ m, else 0."""
    q, low = r // m, 0
    while q >= 2:
        q //= 2
        low += 1
    return low


def ef_decode(head: list[int], stream: bytes, count: int, *, strict: bool) -> list[int]:
    """§7.18: the ``count`` values of a chunked Elias-Fano sequence, read bit by bit, with
    every check the section lists (``strict``: a strictly increasing sequence)."""
    chunks = -(-count // EF_CHUNK)
    if len(head) != 2 * (chunks + 1):
        raise FormatError(f"EF header has {len(head)} entries, expected {2 * (chunks + 1)}")
    first, off = head[0::2], head[1::2]
    if off[0] != 0 or any(b < a for a, b in zip(off, off[1:])):
        raise FormatError("EF bit offsets")
    if count == 0 and first[0] != 0:
        raise FormatError("empty EF sequence with a non-zero end")
    end = off[chunks]
    if len(stream) != -(-end // 8) + EF_PAD:
        raise FormatError("EF stream length")

    def bit(p: int) -> int:  # stream bit p: bit (p mod 8) of byte ⌊p/8⌋
        return (stream[p // 8] >> (p % 8)) & 1

    if any(bit(p) for p in range(end, 8 * len(stream))):
        raise FormatError("EF bit set past the end")
    out: list[int] = []
    for c in range(chunks):
        m = min(EF_CHUNK, count - EF_CHUNK * c)
        r = first[c + 1] - first[c]
        if r < 0 or (strict and r < m):
            raise FormatError(f"EF chunk {c} first values")
        low = ef_low_width(r, m)
        if off[c + 1] - off[c] != m * low + (r >> low) + m:
            raise FormatError(f"EF chunk {c} size")
        lows = [sum(bit(off[c] + k * low + j) << j for j in range(low)) for k in range(m)]
        region = off[c] + m * low
        ones = [p - region for p in range(region, off[c + 1]) if bit(p)]
        if len(ones) != m:
            raise FormatError(f"EF chunk {c} has {len(ones)} high bits set, expected {m}")
        vals = [first[c] + (ones[k] - k) * 2**low + lows[k] for k in range(m)]
        if vals[0] != first[c] or vals[-1] > first[c + 1]:
            raise FormatError(f"EF chunk {c} values outside [F_c, F_c+1]")
        out += vals
    if count and out[-1] + 1 != first[chunks]:
        raise FormatError("EF sentinel is not the last value + 1")
    if any(b < a or (strict and b == a) for a, b in zip(out, out[1:])):
        raise FormatError("EF sequence not increasing")
    return out


def ef_encode_doc(values: list[int]) -> tuple[list[int], bytes]:
    """§7.18 the other way round: the header values and the stream of a non-decreasing
    sequence (used to craft files; the library's encoder must give the same bytes)."""
    count = len(values)
    chunks = -(-count // EF_CHUNK)
    first = [values[EF_CHUNK * c] for c in range(chunks)] + [values[-1] + 1 if count else 0]
    bits: list[int] = []
    head: list[int] = []
    for c in range(chunks):
        m = min(EF_CHUNK, count - EF_CHUNK * c)
        r = first[c + 1] - first[c]
        low = ef_low_width(r, m)
        head += [first[c], len(bits)]
        d = [values[EF_CHUNK * c + k] - first[c] for k in range(m)]
        for x in d:
            bits += [(x >> j) & 1 for j in range(low)]
        high = [0] * ((r >> low) + m)
        for k, x in enumerate(d):
            high[(x >> low) + k] = 1
        bits += high
    head += [first[chunks], len(bits)]
    stream = bytes(sum(b << j for j, b in enumerate(bits[i : i + 8])) for i in range(0, len(bits), 8))
    return head, stream + bytes(EF_PAD)


def id_type(n: int) -> str:
    """§5: u16 if n + 3 < 65535, else u32."""
    return "u16" if n + 3 < 65535 else "u32"


def head(q: bytes, pad: int) -> int:
    """§7.4: the first 4 bytes of ``q``, padded with ``pad``, as a big-endian number."""
    return int.from_bytes(q[:4] + bytes([pad]) * (4 - len(q[:4])), "big")


def topk_levels(n: int) -> list[int]:
    """§7.5: nb_l = ceil(n / F^l) for l = 1, 2, … up to the first level with nb_l <= F."""
    levels, size = [], F
    while True:
        levels.append(-(-n // size))
        if levels[-1] <= F:
            return levels
        size *= F


@dataclass
class Entry:
    tag: str
    code: int
    offset: int
    length: int
    crc: int
    reserved: bytes


class NwmReader:
    """Reads and fully checks a model file following docs/FORMAT.md (§§3–8)."""

    def __init__(self, path: str | Path) -> None:
        data = Path(path).read_bytes()
        self.data = data
        if len(data) < HEADER.size:
            raise FormatError("shorter than the header")
        magic, major, minor, count, size, table_crc, head_crc = HEADER.unpack_from(data, 0)
        if magic != MAGIC:
            raise FormatError("bad magic")
        if zlib.crc32(data[:28]) != head_crc:
            raise FormatError("header CRC")
        if major != 1:
            raise FormatError("major version")
        if size != len(data):
            raise FormatError("file size")
        if not 1 <= count <= 64:
            raise FormatError("section count")
        table_end = HEADER.size + ENTRY.size * count
        if table_end > len(data) or zlib.crc32(data[HEADER.size : table_end]) != table_crc:
            raise FormatError("table CRC")
        self.version = (major, minor)
        self.header = dict(magic=magic, major=major, minor=minor, count=count, size=size,
                           table_crc=table_crc, head_crc=head_crc)  # fmt: skip
        self.entries: list[Entry] = []
        prev_end = table_end
        for i in range(count):
            tag_b, code, res1, off, length, crc, res2 = ENTRY.unpack_from(data, HEADER.size + i * ENTRY.size)
            tag = tag_b.decode("ascii")
            if tag in (e.tag for e in self.entries):
                raise FormatError(f"{tag} twice")
            if code not in ELEMENTS:
                raise FormatError(f"{tag}: element code {code}")
            item = 1 if ELEMENTS[code] is None else ELEMENTS[code].itemsize
            if off % 8 or off < prev_end or off + length > len(data) or length % item:
                raise FormatError(f"{tag}: bad offset or length")
            if any(data[prev_end:off]):
                raise FormatError(f"{tag}: non-zero padding before it")
            prev_end = off + length
            self.entries.append(Entry(tag, code, off, length, crc, res1 + res2))
        if len(data) != prev_end + (-prev_end % 8) or any(data[prev_end:]):
            raise FormatError("bytes after the last section")
        self.sections = {e.tag: e for e in self.entries}
        self.layout = LAYOUT_16 if self.version == (1, 6) else LAYOUT  # §7.18
        missing = set(self.layout) - set(self.sections)
        if missing:
            raise FormatError(f"missing {sorted(missing)}")
        for e in self.entries:  # this reader always checks every CRC (§8, item 13)
            if zlib.crc32(data[e.offset : e.offset + e.length]) != e.crc:
                raise FormatError(f"{e.tag} CRC")

        self.meta = msgpack.unpackb(self.raw("META"), raw=False, strict_map_key=True)
        self._check_meta()
        n = self.n = self.meta["n_words"]
        self.id_type = id_type(n)
        self.a: dict[str, np.ndarray] = {}
        for tag, kind in self.layout.items():
            want = self.id_type if kind == "id" else kind
            e = self.sections[tag]
            if e.code not in [CODE_OF[t] for t in want.split("|")]:
                raise FormatError(f"{tag}: element code {e.code}, expected {want}")
            if kind != "raw":
                dt = ELEMENTS[e.code]
                self.a[tag] = np.frombuffer(data, dtype=dt, count=e.length // dt.itemsize, offset=e.offset)
        # §7.2: the trie is handed to marisa only after its CRC was checked above
        self.trie = marisa_trie.Trie()
        self.trie.frombytes(self.raw("TRIE"))
        self.total = self.meta["total"]
        self.lam = self.meta["lambda"]
        codec = self.meta.get("codec")
        # §7.17, §7.18: the value sections hold codes in a 1.5 file and in a 1.6 file of codec quant
        self.coded = self.version == (1, 5) or (
            self.version == (1, 6) and isinstance(codec, dict) and codec.get("name") == "quant"
        )
        if self.version == (1, 6):
            self._expand_16()
        elif "successors" in self.meta:  # §7.18: refused in files 1.0–1.5
            raise FormatError("META successors in a file older than 1.6")
        self._check_arrays()
        self.keys = [self.trie.restore_key(int(m)) for m in self.a["IDTK"]]  # key of each word id
        self.alpha_keys = [self.keys[w] for w in self.a["ALPH"][: self.n]]  # key at each position

    def raw(self, tag: str) -> bytes:
        e = self.sections[tag]
        return self.data[e.offset : e.offset + e.length]

    def ef(self, name: str, count: int, *, strict: bool) -> list[int]:
        """§7.18: the sequence of sections ``name``H/``name``B."""
        return ef_decode(self.a[name + "H"].tolist(), self.raw(name + "B"), count, strict=strict)

    def prefix_sums(self, name: str, count: int, *, positive: bool = False) -> np.ndarray:
        """§7.18: ``count`` values stored as their count + 1 prefix sums 0, x₀, x₀+x₁, …
        (x_i = P_{i+1} − P_i; ``positive``: every x ≥ 1, a strictly increasing sequence);
        each x must fit the u32 of the section it replaces."""
        cum = np.array(self.ef(name, count + 1, strict=positive), dtype=np.int64)
        x = np.diff(cum)
        if cum[0] != 0 or (count and int(x.max()) > 0xFFFFFFFF):
            raise FormatError(f"{name} does not hold prefix sums from 0 of 32-bit values")
        return x

    def _expand_16(self) -> None:
        """§7.18: rebuild ROWS, SUCC, UNIG, IDTK and APOS of a 1.6 file from its sequences;
        the checks of §8 then run on them as for any other file."""
        a, n, b = self.a, self.n, self.meta["bigrams"]
        if self.meta.get("successors") != SUCCESSORS_16:
            raise FormatError(f"META successors = {self.meta.get('successors')!r}")
        rows = np.array(self.ef("RWE", n + 4, strict=False), dtype=np.int64)
        a["UNIG"] = self.prefix_sums("UNE", n + 2)
        for tag, inv, m in (("TKID", "IDTK", n), ("ALPH", "APOS", n + 2)):  # permutations first
            perm = a[tag].astype(np.int64)
            if not np.array_equal(np.sort(perm), np.arange(m)):
                raise FormatError(f"{tag} is not a permutation")
            out = np.zeros(m, dtype=np.int64)
            out[perm] = np.arange(m)
            a[inv] = out
        y = np.array(self.ef("SEF", b, strict=True), dtype=np.int64)
        if len(y) and y[-1] >= (n + 3) * (n + 2):
            raise FormatError("SEF value past the last row")
        if rows[0] != 0 or rows[-1] != b or np.any(np.diff(rows) < 0):
            raise FormatError("ROWS offsets")
        row_of = np.repeat(np.arange(n + 3), np.diff(rows))
        succ = y - row_of * (n + 2)  # the position of entry i of row v: Y_i − v·(n+2)
        if np.any(succ < 0) or np.any(succ >= n + 2):
            raise FormatError("SEF value outside its row")
        a["ROWS"], a["SUCC"] = rows, succ

    def _check_meta(self) -> None:  # §7.1
        m = self.meta
        if not isinstance(m, dict) or len(self.raw("META")) > 1 << 20:
            raise FormatError("META")

        def need(key: str, types: tuple[type, ...], lo: float, hi: float) -> None:
            v = m.get(key)
            if isinstance(v, bool) or not isinstance(v, types) or not lo <= v <= hi:
                raise FormatError(f"META {key} = {v!r}")

        need("n_words", (int,), 1, min(len(self.data), 0xFFFFFFF0))
        need("lambda", (float, int), 0.0, 1.0)
        need("total", (int,), 1, 1 << 53)
        need("bigrams", (int,), 0, len(self.data))
        need("skyband_k", (int,), 1, 4096)
        need("skyband_min", (int,), 0, 1 << 32)
        need("max_key_chars", (int,), 1, 1 << 20)
        if m.get("topk_fanout") != F or not isinstance(m.get("stats", {}), dict):
            raise FormatError("META topk_fanout / stats")

    def _check_arrays(self) -> None:  # §7 and §8 items 10–17
        a, n, b, K = self.a, self.n, self.meta["bigrams"], self.meta["skyband_k"]
        lengths = {
            "TKID": n, "IDTK": n, "KEY4": n, "ALPH": n + 2, "APOS": n + 2, "UNIG": n + 2,
            "ROWS": n + 4, "SUCC": b, "SEGE": len(a["SEGS"]),
            "SKYP": len(a["SEGS"]) + 1, "SKYC": len(a["SEGS"]) * K,
            "TOPK": F * sum(topk_levels(n)), "DISO": len(a["DISI"]) + 1,
        }  # fmt: skip
        if not self.coded:  # §7.17: a 1.5 (or quant 1.6) file's value sections hold codes (NgramReader reads them)
            lengths |= {"CNTS": b, "BIGC": len(a["BIGI"])}
        for tag, want in lengths.items():
            if len(a[tag]) != want:
                raise FormatError(f"{tag} has {len(a[tag])} entries, expected {want}")
        if len(self.trie) != n:
            raise FormatError("trie size")
        def inverse_permutations(p: np.ndarray, inv: np.ndarray, m: int) -> bool:
            return np.array_equal(np.sort(p), np.arange(m)) and np.array_equal(inv[p], np.arange(m))

        if not inverse_permutations(a["TKID"], a["IDTK"], n):
            raise FormatError("TKID/IDTK")
        if not inverse_permutations(a["ALPH"], a["APOS"], n + 2):
            raise FormatError("ALPH/APOS")
        if a["ALPH"][n] != n or a["ALPH"][n + 1] != n + 1:
            raise FormatError("ALPH does not end with </s>, <unk>")
        if int(a["UNIG"].sum(dtype=np.int64)) != self.total:
            raise FormatError("total")
        for tag, end in (("ROWS", b), ("SKYP", len(a["SKYI"])), ("DISO", self.sections["DISB"].length)):
            arr = a[tag].astype(np.int64)
            if arr[0] != 0 or arr[-1] != end or np.any(np.diff(arr) < 0):
                raise FormatError(f"{tag} offsets")
        if np.any(np.diff(a["DISI"].astype(np.int64)) <= 0) or np.any(a["DISI"] >= n):
            raise FormatError("DISI")
        rows = a["ROWS"].astype(np.int64)
        succ = a["SUCC"].astype(np.int64)
        if np.any(succ >= n + 2) or rows[n + 1] != rows[n]:
            raise FormatError("SUCC / row of </s>")
        row_of = np.repeat(np.arange(n + 3), np.diff(rows))
        if np.any(np.diff(row_of * (n + 2) + succ) <= 0):
            raise FormatError("SUCC not strictly increasing within a row")
        cnts, bigi = a["CNTS"], a["BIGI"].astype(np.int64)
        if not self.coded and (
            np.any(cnts == 0) or not np.array_equal(np.flatnonzero(cnts == ESCAPE), bigi) or np.any(a["BIGC"] < ESCAPE)
        ):
            raise FormatError("CNTS/BIGI/BIGC")
        # §7.9: segments inside one row, word successors only, sorted; bands inside them
        segs, sege = a["SEGS"].astype(np.int64), a["SEGE"].astype(np.int64)
        row_of_seg = np.searchsorted(rows, segs, side="right") - 1
        if np.any(sege <= segs) or np.any(sege > rows[np.minimum(row_of_seg + 1, n + 3)]):
            raise FormatError("SEGS/SEGE not inside one row")
        if len(segs) and (np.any(succ[sege - 1] >= n) or np.any(np.diff(segs * (b + 1) + sege) <= 0)):
            raise FormatError("SEGS/SEGE not sorted, or covering </s> or <unk>")
        skyp, skyi = a["SKYP"].astype(np.int64), a["SKYI"].astype(np.int64)
        if skyp[0] != 0 or skyp[-1] != len(skyi) or np.any(np.diff(skyp) < 0):
            raise FormatError("SKYP offsets")
        skyc = a["SKYC"].astype(np.int64)
        for i in range(len(segs)):
            # §7.9: distinct offsets inside the segment, in dominance order (not ascending)
            off = skyi[skyp[i] : skyp[i + 1]]
            if np.any(off >= sege[i] - segs[i]) or len(np.unique(off)) != len(off):
                raise FormatError(f"SKYI of segment {i}")
            # §7.9: K non-decreasing counts, the first >= 1, the last = the band length
            c = skyc[i * K : (i + 1) * K]
            if c[0] < 1 or np.any(np.diff(c) < 0) or c[-1] != len(off):
                raise FormatError(f"SKYC of segment {i}")
        keys = [self.trie.restore_key(int(a["IDTK"][w])) for w in a["ALPH"][:n]]
        if any(x >= y for x, y in zip(keys, keys[1:])):
            raise FormatError("ALPH not alphabetical")
        if a["KEY4"].tolist() != [head(k.encode("utf-8"), 0) for k in keys]:
            raise FormatError("KEY4")
        self.raw("DISB").decode("utf-8")

    # -- §7.6 history counts, derived from UNIG ---------------------------------------------

    def history_count(self, v: int) -> int:
        """c(v): UNIG[v] for a word or <unk>, 0 for </s> (id n), UNIG[n] for <s> (id n+2)."""
        if v == self.n:
            return 0
        if v == self.n + 2:
            return int(self.a["UNIG"][self.n])
        return int(self.a["UNIG"][v])

    # -- §7.8 full counts ------------------------------------------------------------------

    def full_counts(self) -> np.ndarray:
        c = self.a["CNTS"].astype(np.int64)
        c[self.a["BIGI"].astype(np.int64)] = self.a["BIGC"]
        return c

    # -- §9.2 ids ----------------------------------------------------------------------------

    def word_id(self, key: str) -> int | None:
        return int(self.a["TKID"][self.trie.key_id(key)]) if key in self.trie else None

    def history_id(self, word: str | None) -> int:
        if word is None:
            return self.n + 2
        if word == "<unk>":
            return self.n + 1
        wid = self.word_id(word)
        return self.n + 1 if wid is None else wid

    def predicted_id(self, word: str) -> int:
        if word == "</s>":
            return self.n
        if word == "<unk>":
            return self.n + 1
        wid = self.word_id(word)
        return self.n + 1 if wid is None else wid

    # -- §9.3 P(w | v) -------------------------------------------------------------------------

    def pair_count(self, v: int, w: int) -> int:
        s, e = int(self.a["ROWS"][v]), int(self.a["ROWS"][v + 1])
        p = int(self.a["APOS"][w])
        succ = self.a["SUCC"]
        i = bisect.bisect_left(succ, p, s, e)
        if i == e or succ[i] != p:
            return 0
        if self.coded:
            return int(self.full_counts()[i])
        c = int(self.a["CNTS"][i])
        if c == ESCAPE:
            j = bisect.bisect_left(self.a["BIGI"], i)
            assert self.a["BIGI"][j] == i
            c = int(self.a["BIGC"][j])
        return c

    def prob(self, v: int, w: int, lam: float) -> float:
        cv = self.history_count(v)
        u = int(self.a["UNIG"][w]) / self.total
        if cv == 0:
            return u
        return lam * (self.pair_count(v, w) / cv) + (1.0 - lam) * u

    # -- §7.10 display -----------------------------------------------------------------------

    def display(self, wid: int) -> str:
        disi, diso = self.a["DISI"], self.a["DISO"]
        i = bisect.bisect_left(disi, wid)
        if i < len(disi) and disi[i] == wid:
            return self.raw("DISB")[int(diso[i]) : int(diso[i + 1])].decode("utf-8")
        return self.keys[wid]

    # -- §9.4 prefix range: KEY4, then UTF-8 bytes of the keys ----------------------------

    def prefix_range(self, prefix: str) -> tuple[int, int]:
        if not prefix:
            return 0, self.n
        if len(prefix) > self.meta["max_key_chars"]:
            return 0, 0
        q = prefix.encode("utf-8")
        key4 = self.a["KEY4"]
        lo = bisect.bisect_left(key4, head(q, 0x00))
        hi = bisect.bisect_right(key4, head(q, 0xFF), lo)
        if len(q) > 4 and lo < hi:
            cut = [k.encode("utf-8")[: len(q)] for k in self.alpha_keys[lo:hi]]  # what each probe compares
            lo, hi = lo + bisect.bisect_left(cut, q), lo + bisect.bisect_right(cut, q)
        return lo, hi

    # -- §9.5 k smallest ids of a position range through TOPK ------------------------------

    def top_blocks(self, level: int) -> np.ndarray:
        levels = topk_levels(self.n)
        start = F * sum(levels[: level - 1])
        return self.a["TOPK"][start : start + F * levels[level - 1]].reshape(-1, F)

    def range_top_ids(self, lo: int, hi: int, k: int) -> list[int]:
        alph = self.a["ALPH"]
        if hi - lo <= 2 * F or k > F:
            vals = alph[lo:hi].astype(np.int64)
        else:
            n_levels = len(topk_levels(self.n))
            taken: list[np.ndarray] = []

            def blocks(level: int, i: int, j: int) -> None:
                taken.append(alph[i:j] if level == 0 else self.top_blocks(level)[i:j, :k].ravel())

            a, b, unit, level = lo, hi, 1, 0
            while True:
                nxt = unit * F
                A = -(-a // nxt) * nxt
                B = (b // nxt) * nxt
                if level == n_levels or A >= B:
                    blocks(level, a // unit, b // unit)
                    break
                blocks(level, a // unit, A // unit)
                blocks(level, B // unit, b // unit)
                a, b, unit, level = A, B, nxt, level + 1
            vals = np.concatenate(taken).astype(np.int64)
        vals = np.sort(vals[vals < self.n])
        return vals[:k].tolist()

    # -- §9.6 top-k ---------------------------------------------------------------------------

    def _score(self, v: int, entries: np.ndarray, lam: float, cv: int) -> tuple[np.ndarray, np.ndarray]:
        full = self.full_counts()
        pos = self.a["SUCC"][entries].astype(np.int64)
        ids = self.a["ALPH"][pos].astype(np.int64)
        return pos, lam * (full[entries] / cv) + (1.0 - lam) * (self.a["UNIG"][ids] / self.total)

    def top_k(self, v: int, lo: int, hi: int, k: int, lam: float) -> list[tuple[str, float]]:
        a = self.a
        cv = self.history_count(v)
        if cv == 0:
            lam = 0.0
        rs, re_ = int(a["ROWS"][v]), int(a["ROWS"][v + 1])
        succ = a["SUCC"]
        s = bisect.bisect_left(succ, lo, rs, re_)
        e = bisect.bisect_left(succ, hi, s, re_)
        if lam == 1.0:
            pos, score = self._score(v, np.arange(s, e), lam, cv)
            cand = {int(p): float(x) for p, x in zip(pos, score)}
            best = sorted(cand, key=lambda p: (-cand[p], int(a["ALPH"][p])))[:k]  # §9.6: ties by id
            rest = sorted((p for p in range(lo, hi) if p not in cand), key=lambda p: int(a["ALPH"][p]))[: k - len(best)]
            return [(self.alpha_keys[p], cand.get(p, 0.0)) for p in best + rest]
        cand = {}
        for wid in self.range_top_ids(lo, hi, k):  # (a)
            cand[int(a["APOS"][wid])] = (1.0 - lam) * (int(a["UNIG"][wid]) / self.total)
        if lam > 0.0:  # (b)
            entries = np.arange(s, e)
            if e - s > self.meta["skyband_min"] and k <= self.meta["skyband_k"]:
                i = self.segment(s, e)
                if i is not None:
                    entries = self.band_entries(i, k)
            pos, score = self._score(v, entries, lam, cv)
            cand.update({int(p): float(x) for p, x in zip(pos, score)})
        best = sorted(cand, key=lambda p: (-cand[p], int(a["ALPH"][p])))[:k]  # §9.6: ties by id
        return [(self.alpha_keys[p], cand[p]) for p in best]

    def segment(self, s: int, e: int) -> int | None:
        """§9.6 step 5: the index of the segment [s, e), if stored."""
        segs, sege = self.a["SEGS"], self.a["SEGE"]
        i = bisect.bisect_left(segs, s)
        while i < len(segs) and segs[i] == s:
            if sege[i] == e:
                return i
            i += 1
        return None

    def band_entries(self, i: int, k: int) -> np.ndarray:
        """§9.6 step 5: the first SKYC[i·K + k − 1] band entries of segment i (k ≤ K), as
        row entry indices, in their stored (dominance) order."""
        a, K = self.a, self.meta["skyband_k"]
        start = int(a["SKYP"][i])
        stop = start + int(a["SKYC"][i * K + k - 1])
        assert stop <= int(a["SKYP"][i + 1])  # §8: bound SKYC before reading that many
        return int(a["SEGS"][i]) + a["SKYI"][start:stop].astype(np.int64)

    def brute_top_k(self, v: int, lo: int, hi: int, k: int, lam: float) -> list[tuple[str, float]]:
        """Score every word of the range with §9.3 and sort by (probability desc, id asc) (§9.6)."""
        a = self.a
        cv = self.history_count(v)
        pos = np.arange(lo, hi)
        ids = a["ALPH"][lo:hi].astype(np.int64)
        u = a["UNIG"][ids] / self.total
        if cv == 0:
            p = u
        else:
            c = np.zeros(hi - lo, dtype=np.int64)
            rs, re_ = int(a["ROWS"][v]), int(a["ROWS"][v + 1])
            rpos = a["SUCC"][rs:re_].astype(np.int64)
            inside = (rpos >= lo) & (rpos < hi)
            c[rpos[inside] - lo] = self.full_counts()[rs:re_][inside]
            p = lam * (c / cv) + (1.0 - lam) * u
        order = np.lexsort((ids, -p))[:k]
        return [(self.alpha_keys[int(pos[i])], float(p[i])) for i in order]


# ----------------------------------------------------------------------------- fixtures

def _pydoc_lines(count: int) -> list[str]:
    """The first ``count`` non-empty lines of the documentation topics that ship with Python.

    Source: ``pydoc_data.topics`` in the standard library (the text ``help()`` shows,
    generated from the Python Language Reference), topics joined in sorted key order.
    These lines start with the "assert" and "assignment" topics. The exact text varies a
    little between Python versions, so every expected value below that depends on it is
    recomputed from these lines by the test, never typed in.
    """
    text = "\n".join(topics[k] for k in sorted(topics))
    return [line for line in text.splitlines() if line.strip()][:count]


# Real English of the Python documentation: 120 lines are ~300 words with min_count=1,
# small enough for the all-pairs probability test. The grammar rules in it ("::=", "=",
# "|") and version numbers are symbols and numbers, so the <unk> history row is not empty.
PYDOC = _pydoc_lines(120)

# The "I am Sam" corpus of Jurafsky & Martin, Speech and Language Processing (3rd ed.
# draft), chapter 3 (N-gram Language Models), §3.1. It is also the worked example of
# docs/FORMAT.md §10.
SAM_I_AM = ["I am Sam.", "Sam I am.", "I do not like green eggs and ham."]
# Repeated 150 times so that two pairs pass 254 and exercise the count escape (CNTS = 255,
# full count in BIGC; COUNT_ESCAPE in nextword/store.py): (<s>, i) starts "I am Sam" and
# "I do not like…", (i, am) is in "I am Sam" and "Sam I am", so each is 2 × 150 = 300.
# Every other Sam pair occurs once per repetition: 150 < 255, stored directly.
SAM_REPEATS = 150
REAL = PYDOC + SAM_I_AM * SAM_REPEATS


@pytest.fixture(scope="module")
def real(tmp_path_factory: pytest.TempPathFactory) -> tuple[NwmReader, nextword.Model, Path]:
    # a small skyband_min and skyband_k so that there are segments in a small corpus
    path = tmp_path_factory.mktemp("real") / "real.nwm"
    nextword.train_texts(REAL, path, min_count=1, skyband_min=3, skyband_k=2)
    return NwmReader(path), nextword.load(path), path


def _brute_pair_counts(messages: list[str]) -> Counter[tuple[str, str]]:
    """c(v, w) for every pair of keys, counted directly with a Counter (min_count=1, so no
    word is out of vocabulary): each sentence of ``nextword.text.sentences`` is
    ``<s> w1 … wk </s>``, a context break (``None``) is ``<unk>``."""
    pairs: Counter[tuple[str, str]] = Counter()
    for message in messages:
        for sentence in sentences(message):
            toks = ["<s>", *("<unk>" if w is None else fold(w) for w in sentence), "</s>"]
            pairs.update(zip(toks, toks[1:]))
    return pairs


def _expected_displays(messages: list[str]) -> dict[str, str]:
    """The display spelling of every key, recomputed from the rule documented on
    ``nextword.counts.CountBuilder._display`` (and FORMAT.md §7.10): the most frequent
    spelling away from sentence starts, ties preferring the key, then code point order;
    a word seen only at sentence starts keeps the key when the spelling is just the key
    with its first letter capitalised (the capital is explained by the position), else
    its most frequent spelling there (same ties)."""
    seen: dict[str, Counter[str]] = defaultdict(Counter)
    first: dict[str, Counter[str]] = defaultdict(Counter)  # as the first word of a sentence
    for message in messages:
        for sentence in sentences(message):
            for i, w in enumerate(sentence):
                if w is not None:
                    seen[fold(w)][w] += 1
                    if i == 0:
                        first[fold(w)][w] += 1
    out = {}
    for key, spellings in seen.items():
        away = {s: c - first[key][s] for s, c in spellings.items()}
        if max(away.values()) > 0:
            out[key] = min(spellings, key=lambda s: (-away[s], s != key, s))
        else:
            s = min(spellings, key=lambda s: (-first[key][s], s != key, s))
            out[key] = key if s == key[:1].upper() + key[1:] else s
    return out


def _syllable_words(count: int) -> list[str]:
    cons, vowels = "bdfgklmnprstvz", "aeiou"
    syl = [c + v for c in cons for v in vowels]
    return ["".join(t) for t in itertools.islice(itertools.product(syl, repeat=3), count)]


@pytest.fixture(scope="module")
def boundary_corpus() -> list[str]:
    # Synthetic random data for a structural limit, not content: 65 532 distinct
    # syllable strings (no real text has that many words in a test-sized corpus) with
    # Zipf-distributed counts, so that the id type switches from u16 to u32 at the size
    # §5 gives, ids differ from the alphabetical order and TOPK has two levels.
    rng = np.random.default_rng(2024)
    words = _syllable_words(65532)
    reps = np.minimum(rng.zipf(1.8, size=len(words)), 40)
    tokens = np.repeat(np.arange(len(words)), reps)
    rng.shuffle(tokens)
    return [" ".join(words[t] for t in tokens[i : i + 11]) + "." for i in range(0, len(tokens), 11)]


# ----------------------------------------------------------------------------- header and table


def test_header_fields_and_crcs(real: tuple[NwmReader, nextword.Model, Path]) -> None:
    r, model, path = real
    data = path.read_bytes()
    h = r.header
    assert data[:8] == b"\x89NWM\r\n\x1a\n"
    assert (h["major"], h["minor"]) == (1, 0) == model.format_version
    assert h["count"] == 22
    assert h["size"] == len(data) == model.file_size
    assert h["table_crc"] == zlib.crc32(data[32 : 32 + 32 * 22])
    assert h["head_crc"] == zlib.crc32(data[:28])
    # zlib's CRC-32 is the IEEE 802.3 one: its standard check value (common practice)
    assert zlib.crc32(b"123456789") == 0xCBF43926


def test_section_table_entries(real: tuple[NwmReader, nextword.Model, Path]) -> None:
    r, _, path = real
    data = path.read_bytes()
    assert [e.tag for e in r.entries] == list(LAYOUT)
    assert r.entries[0].offset == 32 + 32 * len(r.entries)  # no gap after the table
    for e in r.entries:
        want = r.id_type if LAYOUT[e.tag] == "id" else LAYOUT[e.tag]
        assert e.code == CODE_OF["u16" if e.tag in ("SKYI", "SKYC") else want], e.tag  # all segments are short
        assert e.reserved == b"\0" * 7, e.tag
        assert e.offset % 8 == 0
        assert e.crc == zlib.crc32(data[e.offset : e.offset + e.length])
    ends = [e.offset + e.length for e in r.entries]
    for e, prev_end in zip(r.entries[1:], ends):
        assert e.offset == prev_end + (-prev_end % 8)  # written back to back, zero-padded
    assert len(data) == ends[-1] + (-ends[-1] % 8)


def test_meta_fields(real: tuple[NwmReader, nextword.Model, Path]) -> None:
    r, model, _ = real
    m = r.meta
    assert m["generator"] == "nextword"
    assert m["n_words"] == r.n == model.n_words == len(r.trie)
    assert m["lambda"] == 0.9 == model.stored_lam
    assert m["total"] == int(r.a["UNIG"].sum()) == model.total
    assert m["bigrams"] == len(r.a["SUCC"]) == model.n_bigrams
    assert (m["skyband_k"], m["skyband_min"], m["topk_fanout"]) == (2, 3, 64)
    assert m["max_key_chars"] == max(len(k) for k in r.keys)
    assert m["stats"]["messages"] == len(REAL)
    assert r.id_type == "u16"


# ----------------------------------------------------------------------------- section contents


def test_id_space_and_permutations(real: tuple[NwmReader, nextword.Model, Path]) -> None:
    r, _, _ = real
    n, a = r.n, r.a
    unig = a["UNIG"].astype(np.int64)
    # words by descending count, ties by key (code point order)
    order = sorted(range(n), key=lambda w: (-unig[w], r.keys[w]))
    assert order == list(range(n))
    assert r.alpha_keys == sorted(r.keys)
    assert [r.keys[i] for i in a["ALPH"][:n]] == r.alpha_keys
    # KEY4 = big-endian heads, stored as little-endian u32 (§7.4)
    e = r.sections["KEY4"]
    first = r.alpha_keys[0].encode("utf-8")[:4].ljust(4, b"\0")
    assert r.data[e.offset : e.offset + 4] == first[::-1]
    assert a["ALPH"][n:].tolist() == [n, n + 1]
    assert all(r.word_id(k) == w for w, k in enumerate(r.keys))
    assert not any(c in k for k in r.keys for c in "<>\0")
    # §7.6: </s> is never a history; <s> starts every sentence, which ends with one </s>
    sentence_count = sum(len(sentences(m)) for m in REAL)
    assert r.history_count(n) == 0
    assert r.history_count(n + 2) == unig[n] == sentence_count == r.meta["stats"]["sentences"]
    # numbers and symbols ("3.5", "::=", "|" in the pydoc text) break the context: the
    # <unk> row holds one pair per run of them, counted here from the same lines
    breaks = sum(c for (v, _), c in _brute_pair_counts(REAL).items() if v == "<unk>")
    assert r.history_count(n + 1) == int(unig[n + 1]) == breaks > 0


def test_rows_counts_and_escapes(real: tuple[NwmReader, nextword.Model, Path]) -> None:
    r, model, _ = real
    a, n = r.a, r.n
    rows = a["ROWS"].astype(np.int64)
    full = r.full_counts()
    row_of = np.repeat(np.arange(n + 3), np.diff(rows))
    # §7.6 / §8 item 15: the row sums are the history counts derived from UNIG
    derived = [r.history_count(v) for v in range(n + 3)]
    assert np.array_equal(np.bincount(row_of, weights=full, minlength=n + 3), derived)
    col = np.bincount(a["ALPH"][a["SUCC"]], weights=full, minlength=n + 2)
    assert np.array_equal(col, a["UNIG"])
    # every stored pair, decoded to keys, equals a direct count of the training text
    hist_key = [*r.keys, "</s>", "<unk>", "<s>"]
    succ_key = [*r.alpha_keys, "</s>", "<unk>"]
    decoded = {(hist_key[v], succ_key[p]): int(c) for v, p, c in zip(row_of, a["SUCC"], full)}
    brute = _brute_pair_counts(REAL)
    assert decoded == dict(brute)
    # the derived history counts equal how often each history is followed by anything in
    # the text, and the public API's history_count
    followed: Counter[str] = Counter()
    for (v, _), c in brute.items():
        followed[v] += c
    assert {hist_key[v]: derived[v] for v in range(n + 3) if derived[v]} == dict(followed)
    assert [model.history_count(h) for h in [*r.keys, "<unk>", None]] == derived[:n] + derived[n + 1 :]
    # the escapes are exactly the entries with a count >= 255
    escaped = {(hist_key[row_of[i]], succ_key[a["SUCC"][i]]): int(c) for i, c in zip(a["BIGI"], a["BIGC"])}
    assert escaped == {pair: c for pair, c in brute.items() if c >= 255}
    # by hand from the Sam sentences (see SAM_I_AM): c(<s>, i) = c(i, am) = 2 × 150 = 300,
    # plus whatever the pydoc lines add (nothing on Python 3.11: they contain no "I")
    assert 2 * SAM_REPEATS == 300
    pydoc = _brute_pair_counts(PYDOC)
    want_si = 300 + pydoc["<s>", "i"]
    want_ia = 300 + pydoc["i", "am"]
    assert escaped["<s>", "i"] == want_si and escaped["i", "am"] == want_ia
    i, am = r.word_id("i"), r.word_id("am")
    assert i is not None and am is not None
    assert r.pair_count(n + 2, i) == want_si == model.bigram_count(None, "i")
    assert r.pair_count(i, am) == want_ia == model.bigram_count("i", "am")
    # (am, </s>) ends "Sam I am" only: 150, below the escape, stored in CNTS directly
    assert r.pair_count(am, n) == SAM_REPEATS + pydoc["am", "</s>"] == model.bigram_count("am", "</s>")


def test_topk_blocks_hold_the_smallest_ids(real: tuple[NwmReader, nextword.Model, Path]) -> None:
    _check_topk_blocks(real[0])


def _check_topk_blocks(r: NwmReader) -> None:
    pad = 0xFFFF if r.id_type == "u16" else 0xFFFFFFFF
    alph = r.a["ALPH"][: r.n].astype(np.int64)
    for level, nb in enumerate(topk_levels(r.n), start=1):
        blocks = r.top_blocks(level)
        assert blocks.shape == (nb, F)
        size = F**level
        for j in range(nb):
            want = np.sort(alph[j * size : (j + 1) * size])[:F]
            got = blocks[j].astype(np.int64)
            assert np.array_equal(got[: len(want)], want)
            assert np.all(got[len(want) :] == pad)


def _brute_band(ids: list[int], counts: list[int], K: int) -> tuple[list[int], list[int], list[int]]:
    """§7.9 by its definition, all pairs: the dominators of every offset of a segment, the
    K-skyband sorted by (dominators, offset), and SKYC (band entries with < j dominators)."""
    doms = [sum(counts[x] >= counts[w] and ids[x] < ids[w] for x in range(len(ids))) for w in range(len(ids))]
    band = sorted((o for o in range(len(ids)) if doms[o] < K), key=lambda o: (doms[o], o))
    return doms, band, [sum(doms[o] < j for o in band) for j in range(1, K + 1)]


def test_skyband_example_of_section_7_9() -> None:
    ex = _doc_arrays("skyband-example")
    K = 2  # as the example says
    doms, band, skyc = _brute_band(ex["ids"], ex["counts"], K)
    assert (doms, band, skyc) == (ex["dominators"], ex["SKYI"], ex["SKYC"])
    assert band != sorted(band)  # the example shows the dominance order


def test_segments_and_skybands_follow_section_7_9(real: tuple[NwmReader, nextword.Model, Path]) -> None:
    r, _, path = real
    a, n = r.a, r.n
    K, M = r.meta["skyband_k"], r.meta["skyband_min"]
    rows, full = a["ROWS"].astype(np.int64), r.full_counts()
    # every range of word successors sharing a prefix, with more than M entries
    want: set[tuple[int, int]] = set()
    for v in range(n + 3):
        words = [i for i in range(int(rows[v]), int(rows[v + 1])) if a["SUCC"][i] < n]
        keys = [r.alpha_keys[a["SUCC"][i]] for i in words]
        for key in keys:
            for depth in range(len(key) + 1):
                inside = [i for i, k in zip(words, keys) if k.startswith(key[:depth])]
                if len(inside) > M:
                    assert inside == list(range(inside[0], inside[-1] + 1))  # contiguous
                    want.add((inside[0], inside[-1] + 1))
    got = list(zip(a["SEGS"].tolist(), a["SEGE"].tolist()))
    assert got == sorted(want)
    assert len(got) >= 5
    reordered = partial = 0
    for i, (s, e) in enumerate(got):
        ids = [int(a["ALPH"][a["SUCC"][j]]) for j in range(s, e)]
        doms, band, skyc = _brute_band(ids, full[s:e].tolist(), K)
        stored = a["SKYI"][a["SKYP"][i] : a["SKYP"][i + 1]].tolist()
        assert stored == band, i  # (dominators, offset) order
        assert a["SKYC"][i * K : (i + 1) * K].tolist() == skyc, i
        # the first SKYC[i·K + k − 1] entries are exactly those with fewer than k dominators
        for k in range(1, K + 1):
            assert sorted(r.band_entries(i, k).tolist()) == [s + o for o in range(e - s) if doms[o] < k]
        reordered += stored != sorted(stored)
        partial += skyc[0] < len(band)
    # the real text exercises both: a band whose dominance order is not the offset order,
    # and a top-1 query that reads only part of its band
    assert reordered > 0 and partial > 0
    # every segment as a query: its successors are those of the longest prefix their keys
    # share, so the reader goes through the segment's band for k <= K; the answers equal
    # the brute force and the public API
    apis = {lam: nextword.load(path, lam=lam) for lam in (0.2, 0.9)}
    for i, (s, e) in enumerate(got):
        v = int(np.searchsorted(rows, s, side="right")) - 1
        first, last = r.alpha_keys[a["SUCC"][s]], r.alpha_keys[a["SUCC"][e - 1]]
        prefix = os.path.commonprefix([first, last])
        lo, hi = r.prefix_range(prefix)
        rs, re_ = int(rows[v]), int(rows[v + 1])
        assert (bisect.bisect_left(a["SUCC"], lo, rs, re_), bisect.bisect_left(a["SUCC"], hi, rs, re_)) == (s, e)
        assert r.segment(s, e) == i
        h = None if v == n + 2 else "<unk>" if v == n + 1 else r.keys[v]
        for lam, k in itertools.product((0.2, 0.9), range(1, K + 1)):
            got_k = r.top_k(v, lo, hi, k, lam)
            assert got_k == r.brute_top_k(v, lo, hi, k, lam)
            api = apis[lam].rank_ids(h, prefix, k)
            assert [w for w, _ in got_k] == [w for w, _ in api], (h, prefix, k)
            assert [p for _, p in got_k] == pytest.approx([p for _, p in api], abs=1e-12)


# ----------------------------------------------------------------------------- queries


@pytest.mark.parametrize("lam", [None, 0.0, 0.37, 1.0])
def test_every_probability_equals_the_public_api(
    real: tuple[NwmReader, nextword.Model, Path], lam: float | None
) -> None:
    r, _, path = real
    model = nextword.load(path, lam=lam)
    use = r.lam if lam is None else lam
    histories: list[str | None] = [*r.keys, "<unk>", None]
    words = [*r.keys, "</s>", "<unk>"]
    for h in histories:
        v = r.history_id(h)
        ps = [r.prob(v, r.predicted_id(w), use) for w in words]
        for w, p in zip(words, ps):
            assert p == pytest.approx(model.prob(w, h), abs=1e-12), (h, w)
        assert sum(ps) == pytest.approx(1.0, abs=1e-12)


def test_display_spellings_equal_the_public_api(real: tuple[NwmReader, nextword.Model, Path]) -> None:
    r, model, _ = real
    shown = [r.display(w) for w in range(r.n)]
    assert shown == [model.display(w) for w in range(r.n)]
    # every display equals the documented rule applied to the same text, here
    want = _expected_displays(REAL)
    assert {r.keys[w]: shown[w] for w in range(r.n)} == want
    stored = {r.keys[w]: r.display(w) for w in r.a["DISI"].tolist()}
    assert stored == {k: d for k, d in want.items() if d != k}  # only spellings that differ
    # by hand from the Sam sentences: "I" and "Sam" occur away from sentence starts
    # ("Sam I am", "I am Sam"), so they keep their capitals (FORMAT.md §7.10)
    assert stored["i"] == "I" and stored["sam"] == "Sam"
    # pydoc "assert" topic: "... raise AssertionError" is mid-sentence
    assert stored["assertionerror"] == "AssertionError"
    # "The" also occurs mid-sentence in the pydoc lines ("see section The standard type
    # hierarchy"), but "the" is more frequent there, so nothing is stored
    assert "the" not in stored
    # words that only ever open a sentence, capitalised there by position alone, keep the
    # key (in the pydoc lines of Python 3.11: "These equivalences assume…", "Assignments
    # to "__debug__" are illegal.")
    openers = [t[0] for m in REAL for t in sentences(m) if t[0] is not None]
    inside = {fold(w) for m in REAL for t in sentences(m) for w in t[1:] if w is not None}
    positional = {fold(w) for w in openers if w == fold(w)[:1].upper() + fold(w)[1:]} - inside
    assert positional and not positional & set(stored)


@pytest.mark.parametrize("lam", [None, 0.0, 0.5, 1.0])
def test_rankings_follow_the_doc(real: tuple[NwmReader, nextword.Model, Path], lam: float | None) -> None:
    r, _, path = real
    model = nextword.load(path, lam=lam)
    use = r.lam if lam is None else lam
    # words of the pydoc lines ("the" has the largest row after <s>) and of the Sam sentences
    histories = [None, "<unk>", "the", "is", "target", "i", "sam"]
    # prefixes of up to 4 UTF-8 bytes use KEY4 alone; longer ones also compare keys (§9.4);
    # "é…" and "zz" match no key
    prefixes = ["", "t", "th", "a", "as", "s", "zz", "é", "asser", "assign", "target", "ébè", "expression1"]
    assert all(r.prefix_range(q)[1] - r.prefix_range(q)[0] >= 2 for q in ("asser", "assign", "target"))
    for h, prefix, k in itertools.product(histories, prefixes, [1, 2, 3, 5]):
        lo, hi = r.prefix_range(prefix)
        got = r.top_k(r.history_id(h), lo, hi, k, use) if lo < hi else []
        if lo < hi:
            assert got == r.brute_top_k(r.history_id(h), lo, hi, k, use)
        api = model.rank_ids(h, prefix, k)
        assert [w for w, _ in got] == [w for w, _ in api], (h, prefix, k)
        assert [p for _, p in got] == pytest.approx([p for _, p in api], abs=1e-12)


def test_load_checks_match_section_8(real: tuple[NwmReader, nextword.Model, Path], tmp_path: Path) -> None:
    r, _, path = real
    data = path.read_bytes()

    def damaged(tag: str) -> Path:
        e = r.sections[tag]
        assert e.length > 0, tag
        b = bytearray(data)
        b[e.offset + e.length // 2] ^= 0x5A
        out = tmp_path / f"{tag}.nwm"
        out.write_bytes(bytes(b))
        return out

    for tag in (t for t in LAYOUT if t not in BIGRAM_SIZED):  # checked on every load
        with pytest.raises(FormatError, match=f"{tag} CRC"):
            NwmReader(damaged(tag))
        with pytest.raises(nextword.ModelFormatError, match="checksum"):
            nextword.load(damaged(tag))
    for tag in ("SUCC", "CNTS", "BIGC", "SEGS", "SEGE", "SKYP", "SKYI", "SKYC"):  # bigram-sized: only with verify=True
        with pytest.raises(FormatError, match=f"{tag} CRC"):
            NwmReader(damaged(tag))
        nextword.load(damaged(tag)).close()
        with pytest.raises(nextword.ModelFormatError, match="checksum"):
            nextword.load(damaged(tag), verify=True)


# ----------------------------------------------------------------------------- the id type boundary


@pytest.mark.parametrize("n_words, want", [(65531, "u16"), (65532, "u32")])
def test_id_type_switches_at_65532_words(boundary_corpus: list[str], tmp_path: Path, n_words: int, want: str) -> None:
    path = tmp_path / "big.nwm"
    nextword.train_texts(boundary_corpus, path, min_count=1, max_vocab=n_words)
    r = NwmReader(path)
    model = nextword.load(path)
    assert r.n == n_words and r.id_type == want
    for tag, kind in LAYOUT.items():
        if kind == "id":
            assert r.sections[tag].code == CODE_OF[want]
    assert topk_levels(r.n) == [1024, 16]
    _check_topk_blocks(r)

    rng = np.random.default_rng(5)
    hist = [r.keys[int(i)] for i in rng.choice(r.n, 12, replace=False)] + [r.keys[0], "<unk>", None]
    words = [r.keys[int(i)] for i in rng.choice(r.n, 200, replace=False)] + [r.keys[0], "</s>", "<unk>"]
    for h in hist:
        v = r.history_id(h)
        for w in words:
            assert r.prob(v, r.predicted_id(w), r.lam) == pytest.approx(model.prob(w, h), abs=1e-12)

    for prefix in ["", "ba", "di", "fo", "bab", "baba", "babab", "zu"]:
        lo, hi = r.prefix_range(prefix)
        assert (hi - lo > 2 * F) == (prefix in ("", "ba", "di", "fo", "bab"))  # large ranges go through TOPK
        for k in (1, 7, 64, 65):
            want_ids = np.sort(r.a["ALPH"][lo:hi].astype(np.int64))[:k].tolist()
            assert r.range_top_ids(lo, hi, k) == want_ids
        for h, k in itertools.product([None, r.keys[0], "<unk>"], (3, 8, 9)):
            got = r.top_k(r.history_id(h), lo, hi, k, r.lam)
            assert got == r.brute_top_k(r.history_id(h), lo, hi, k, r.lam)
            api = model.rank_ids(h, prefix, k)
            assert [w for w, _ in got] == [w for w, _ in api]
            assert [p for _, p in got] == pytest.approx([p for _, p in api], abs=1e-12)
    # the sentence start has segments for the empty prefix and for "ba", so the bands were used
    bos = r.n + 2
    s, e = int(r.a["ROWS"][bos]), int(r.a["ROWS"][bos + 1])
    words_end = s + int(np.searchsorted(r.a["SUCC"][s:e], r.n))
    assert r.segment(s, words_end) is not None
    lo, hi = r.prefix_range("ba")
    s_ba = bisect.bisect_left(r.a["SUCC"], lo, s, e)
    assert r.segment(s_ba, bisect.bisect_left(r.a["SUCC"], hi, s_ba, e)) is not None


# ----------------------------------------------------------------------------- the worked example


TINY = SAM_I_AM  # the three sentences of the FORMAT.md §10 command


def _doc_header_hex() -> str:
    found = re.findall(r"^header-hex: ([0-9a-f]{64})$", DOC.read_text(encoding="utf-8"), flags=re.M)
    assert len(found) == 1, "FORMAT.md must quote exactly one 'header-hex:' line"
    return found[0]


def _doc_arrays(label: str) -> dict[str, list[int]]:
    """The ``NAME = [..]`` lines of the fenced block of FORMAT.md that starts with ``label:``."""
    block = re.search(rf"^{label}:\n(.*?)^```", DOC.read_text(encoding="utf-8"), flags=re.M | re.S)
    assert block, f"FORMAT.md must hold a '{label}:' block"
    arrays = {}
    for line in block.group(1).splitlines():
        m = re.fullmatch(r"([A-Za-z0-9]+) = \[([0-9, ]*)\]", line.strip())
        assert m, line
        arrays[m.group(1)] = [int(x) for x in m.group(2).split(",") if x.strip()]
    return arrays


def test_worked_example_in_the_doc_is_current(tmp_path: Path) -> None:
    path = tmp_path / "tiny.nwm"
    nextword.train_texts(TINY, path, min_count=1)
    data = path.read_bytes()
    assert data[:32].hex() == _doc_header_hex(), (
        "the model format or content changed: regenerate the worked example of docs/FORMAT.md §10 "
        f"(new header: {data[:32].hex()})"
    )
    r = NwmReader(path)
    arrays = _doc_arrays("decoded-sections")
    assert set(arrays) == set(LAYOUT) - {"META", "TRIE", "TOPK", "DISB"}
    for tag, values in arrays.items():
        assert r.a[tag].tolist() == values, tag
    assert r.a["TOPK"].tolist() == list(range(10)) + [0xFFFF] * 54
    assert r.raw("DISB") == b"ISam"
    assert r.raw("TRIE")[:16] == b"We love Marisa.\0"
    assert [r.trie.restore_key(m) for m in range(10)] == "do eggs green ham i like not sam am and".split()
    # §10 vocabulary table: history counts derived from UNIG (§7.6), none stored
    assert [r.history_count(v) for v in range(13)] == [3, 2, 2, 1, 1, 1, 1, 1, 1, 1, 0, 0, 3]
    # §10.4: P(am | i) by hand
    i, am = r.word_id("i"), r.word_id("am")
    assert (i, am) == (0, 1) and i is not None and am is not None
    assert r.prob(i, am, 0.9) == 0.9 * 2 / 3 + (1 - 0.9) * 2 / 17 == 0.6117647058823529
    assert nextword.load(path).prob("am", "i") == 0.6117647058823529
    assert r.prob(r.n + 2, i, 0.9) == 0.9 * 2 / 3 + (1 - 0.9) * 3 / 17 == nextword.load(path).prob("i", None)
    assert r.prob(r.n + 1, i, 0.9) == 3 / 17 == nextword.load(path).prob("i", "<unk>")
    # §10.5
    assert r.prefix_range("a") == (0, 2)
    assert [w for w, _ in r.top_k(0, 0, 10, 3, 0.9)] == ["am", "do", "i"]


@pytest.mark.parametrize("K, label", [(1, "decoded-segments"), (2, "decoded-segments-k2")])
def test_worked_example_with_segments_is_current(tmp_path: Path, K: int, label: str) -> None:
    path = tmp_path / "tiny_seg.nwm"
    nextword.train_texts(TINY, path, min_count=1, skyband_min=1, skyband_k=K)
    r = NwmReader(path)
    quoted = _doc_arrays(label)
    assert set(quoted) == {"SEGS", "SEGE", "SKYP", "SKYI", "SKYC"}
    for tag, values in quoted.items():
        assert r.a[tag].tolist() == values, tag
    # "All other sections are as in §10.3 except META"
    for tag, values in _doc_arrays("decoded-sections").items():
        if tag not in quoted:
            assert r.a[tag].tolist() == values, tag
    assert r.raw("DISB") == b"ISam"
    assert (r.meta["skyband_k"], r.meta["skyband_min"]) == (K, 1)
    assert r.sections["SKYI"].code == r.sections["SKYC"].code == 2
    # the bands by the §7.9 definition: in row 0 am dominates do, in row 12 i dominates sam
    for i, (s, e) in enumerate([(0, 2), (13, 15)]):
        ids = [int(r.a["ALPH"][r.a["SUCC"][j]]) for j in range(s, e)]
        _, band, skyc = _brute_band(ids, r.full_counts()[s:e].tolist(), K)
        assert r.a["SKYI"][r.a["SKYP"][i] : r.a["SKYP"][i + 1]].tolist() == band
        assert r.a["SKYC"][i * K : (i + 1) * K].tolist() == skyc
    # §10.6: after <s>, the first SKYC[1·K + k − 1] band entries of segment 1 are read:
    # entry 13 (i) for k = 1, entries 13, 14 (i, sam) for k = 2
    bos = r.n + 2
    assert r.segment(13, 15) == 1
    assert r.band_entries(1, 1).tolist() == [13]
    if K == 2:
        assert r.band_entries(1, 2).tolist() == [13, 14]
    (word, p), = r.top_k(bos, 0, r.n, 1, 0.9)
    assert word == "i" and p == 0.9 * 2 / 3 + (1 - 0.9) * 3 / 17
    model = nextword.load(path)
    assert model.rank_ids(None, "", 1) == [(word, p)]
    assert r.top_k(bos, 0, r.n, K, 0.9) == r.brute_top_k(bos, 0, r.n, K, 0.9)
    assert [w for w, _ in r.top_k(bos, 0, r.n, K, 0.9)] == [w for w, _ in model.rank_ids(None, "", K)]


def test_the_title_names_every_version_the_readers_accept() -> None:
    # the model reader accepts 1.0 .. MAX_MINOR; the title must name each of them
    from nextword.store import FORMAT_VERSION, MAX_MINOR

    title = (Path(__file__).resolve().parent.parent / "docs" / "FORMAT.md").read_text(encoding="utf-8").splitlines()[0]
    for minor in range(MAX_MINOR + 1):
        assert f"{FORMAT_VERSION[0]}.{minor}" in title, title


# ---------------------------------------------------------------------------------------
# Format 1.4 (§7.11–7.16, §9.7): Kneser-Ney and the two-word context, read from the
# document alone (the reader above does §§3–8 of the common sections).

TRIGRAM_14 = {"TCTB": "u32", "TLEN": "u8", "TLEI": "u32", "TLEV": "u32", "TSUC": "id", "TVAL": "u8",
              "TBGI": "u32", "TBGC": "u32", "TLNI": "u32", "TLNV": "u32", "TDRI": "u32", "TDRV": "u32",
              "TSGS": "u32", "TSGE": "u32", "TSKP": "u32", "TSKI": "u16|u32", "TSKC": "u16|u32"}  # fmt: skip
BASE_14 = {"HIST": "u32", "HDRI": "id", "HDRV": "u32"}
OPTIONAL_14 = {**BASE_14, "HN13": "u32", **TRIGRAM_14}
KIND_SECTIONS = {  # §7.11; (jm, 2) only in a 1.5 or 1.6 file (§7.17, §7.18)
    ("jm", 2): {*BASE_14},
    ("kn", 2): {*BASE_14, "HN13"},
    ("kn", 3): {*BASE_14, "HN13", *TRIGRAM_14},
    ("jm", 3): {*BASE_14, *TRIGRAM_14},
}
# §7.18: in a 1.6 file sequences (…H u32|u64, …B u8) replace these sections of the 1.4 layout
REPLACED_16 = {
    "HIST": ("HSE",), "HDRI": ("HDI",), "HDRV": ("HDV",), "HN13": ("N1E", "N2E"),
    "TCTB": ("TPT",), "TLEN": (), "TLEI": (), "TLEV": (), "TSUC": ("TEF",), "TDRI": ("TDI",), "TDRV": ("TDV",),
}  # fmt: skip
OPTIONAL_16 = {name + s: k for names in REPLACED_16.values() for name in names for s, k in (("H", "u32|u64"), ("B", "u8"))}
KIND_SECTIONS_16 = {
    kind: (tags - set(REPLACED_16)) | {name + s for t in tags & set(REPLACED_16) for name in REPLACED_16[t] for s in "HB"}
    for kind, tags in KIND_SECTIONS.items()
}
SUMMARY_MIN = 32  # §7.15


ONES_BLOCK = 512  # §7.18, the quant codec version 2: n-grams per block of the ones bitmap
ONES_BLOCK_BYTES = 4 + ONES_BLOCK // 8  # a u32 rank, then 64 bytes of bits


def check_codebook(codebook: np.ndarray, q: int, count: int) -> np.ndarray:
    """§7.17: 1 … 2^q strictly increasing values ≥ 1 (0 entries for an empty level)."""
    cb = codebook.astype(np.int64)
    if count and (len(cb) < 1 or len(cb) > 1 << q or cb[0] < 1 or np.any(np.diff(cb) <= 0)):
        raise FormatError("codebook")
    return cb


def quant2_values(bitmap: bytes, codebook: np.ndarray, code_words: bytes, q: int, count: int) -> np.ndarray:
    """§7.18 "The quant codec, version 2": the ``count`` values of a level from its ones
    bitmap (per block of 512 n-grams a u32 rank and 64 bytes of bits; bit set ⇔ value 1)
    and the q-bit codes of the other values, read one n-gram at a time as the text says."""
    blocks = -(-count // ONES_BLOCK)
    if len(bitmap) != ONES_BLOCK_BYTES * blocks:
        raise FormatError("ones bitmap length")
    cb = check_codebook(codebook, q, count)

    def bit(blk: int, j: int) -> int:  # bit j of block blk: bit j mod 8 of the block's byte ⌊j/8⌋
        return (bitmap[ONES_BLOCK_BYTES * blk + 4 + j // 8] >> (j % 8)) & 1

    ranks = [struct.unpack_from("<I", bitmap, ONES_BLOCK_BYTES * blk)[0] for blk in range(blocks)]
    ones_in = [sum(bit(blk, j) for j in range(ONES_BLOCK)) for blk in range(blocks)]
    if ranks != list(itertools.accumulate(ones_in, initial=0))[:blocks]:  # the first is 0
        raise FormatError("ones bitmap ranks")
    if any(bit(blocks - 1, j) for j in range(count - ONES_BLOCK * (blocks - 1), ONES_BLOCK)) if blocks else False:
        raise FormatError("ones bitmap bits after the last n-gram")
    m = count - (ranks[-1] + ones_in[-1] if blocks else 0)  # the values other than 1
    if len(code_words) != 4 * (-(-m * q // 32)):
        raise FormatError("code section length")
    stream = code_words  # the u32 words' bytes in file order: the bit stream of §7.17
    if any((stream[p // 8] >> (p % 8)) & 1 for p in range(m * q, 8 * len(stream))):
        raise FormatError("bits after the last code")
    out = np.zeros(count, dtype=np.int64)
    for i in range(count):
        blk, j = divmod(i, ONES_BLOCK)
        if bit(blk, j):
            out[i] = 1
            continue
        r = i - ranks[blk] - sum(bit(blk, k) for k in range(j))  # code number r of the stream
        code = sum(((stream[(r * q + k) // 8] >> ((r * q + k) % 8)) & 1) << k for k in range(q))
        if r >= m or code >= len(cb):
            raise FormatError("code past the codebook")
        out[i] = cb[code]
    return out


def quant_values(codes: np.ndarray, codebook: np.ndarray, q: int, count: int) -> np.ndarray:
    """§7.17: ``count`` q-bit codes of a little-endian bit stream, each looked up in the codebook."""
    if len(codes) != (count * q + 7) // 8:
        raise FormatError("code section length")
    cb = check_codebook(codebook, q, count)
    tail = count * q % 8
    if tail and int(codes[-1]) >> tail:
        raise FormatError("unused bits of the last code byte")
    out = np.zeros(count, dtype=np.int64)
    data = codes.tobytes() + b"\0"
    for i in range(count):  # the byte arithmetic of §7.17, one code at a time
        p = i * q
        word = data[p // 8] + 256 * data[p // 8 + 1]
        code = (word >> (p % 8)) & ((1 << q) - 1)
        if code >= len(cb):
            raise FormatError("code past the codebook")
        out[i] = cb[code]
    return out


class NgramReader(NwmReader):
    """§7.11–7.16 (and §7.17 for 1.5): the n-gram sections; §9.7: probabilities and brute-force rankings."""

    def __init__(self, path: str | Path) -> None:
        super().__init__(path)
        if self.version not in ((1, 4), (1, 5), (1, 6)):
            raise FormatError("not a 1.4, 1.5 or 1.6 file")
        m = self.meta
        codec = m.get("codec")
        self.q: int | None = None
        exact = codec == {"name": "exact", "version": 1}
        if (self.version == (1, 4) or self.version == (1, 6) and not self.coded) and not exact:  # §7.11, §7.12, §7.18
            raise FormatError("unknown codec")
        self.quant_version = 0
        if self.coded:  # §7.17 (1.5, or 1.6 with codec quant: §7.18; version 2 in 1.6 files only)
            versions = (1, 2) if self.version == (1, 6) else (1,)
            if not isinstance(codec, dict) or set(codec) != {"name", "version", "bits"} or codec["name"] != "quant" \
                    or codec["version"] not in versions or isinstance(codec["version"], bool) \
                    or codec["bits"] not in range(2, 9) or isinstance(codec["bits"], bool):
                raise FormatError("unknown codec")
            self.q, self.quant_version = codec["bits"], codec["version"]
            self._counts = self.level_values("CNTS", "BIGI", "BIGC", m["bigrams"])
        self.kind = (m["estimator"], m["order"])
        if self.kind == ("jm", 2) and self.version == (1, 4):
            raise FormatError("a JM bigram is 1.5 or 1.6 only among the n-gram layouts")
        kind_sections = (KIND_SECTIONS_16 if self.version == (1, 6) else KIND_SECTIONS)[self.kind]  # §7.18
        if set(self.sections) - set(self.layout) != kind_sections:
            raise FormatError("optional sections do not fit the kind")
        n = self.n
        for tag in kind_sections:
            e = self.sections[tag]
            kind = {**OPTIONAL_14, **OPTIONAL_16}[tag]
            want = self.id_type if kind == "id" else kind
            if e.code not in [CODE_OF[x] for x in want.split("|")]:
                raise FormatError(f"{tag}: element code {e.code}")
            dt = ELEMENTS[e.code]
            self.a[tag] = np.frombuffer(self.data, dtype=dt, count=e.length // dt.itemsize, offset=e.offset)
        a = self.a
        rows = a["ROWS"].astype(np.int64)
        counts = self.full_counts()
        row_of = np.repeat(np.arange(n + 3), np.diff(rows))
        if self.version == (1, 6):
            self._expand_ngram_16(rows)
        # §7.13: HIST = row sums + dropped mass; HDRI/HDRV sparse
        hdri = a["HDRI"].astype(np.int64)
        if len(hdri) != len(a["HDRV"]) or np.any(np.diff(hdri) <= 0) or np.any(hdri >= n + 3) or np.any(a["HDRV"] < 1):
            raise FormatError("HDRI/HDRV")
        self.dropped2 = np.zeros(n + 3, dtype=np.int64)
        self.dropped2[hdri] = a["HDRV"]
        if not np.array_equal(np.bincount(row_of, weights=counts, minlength=n + 3) + self.dropped2, a["HIST"]):
            raise FormatError("HIST")
        if self.kind[0] == "kn":
            # §7.12: UNIG[w] = rows holding w (no dropped mass here)
            if not len(hdri) and not np.array_equal(np.bincount(a["ALPH"][a["SUCC"]], minlength=n + 2), a["UNIG"]):
                raise FormatError("UNIG is not the continuation counts")
            h = a["HN13"].reshape(n + 3, 3)
            for j, mask in enumerate((counts == 1, counts == 2, counts >= 3)):
                if not np.array_equal(np.bincount(row_of[mask], minlength=n + 3), h[:, j]):
                    raise FormatError("HN13")
            self.d = [list(x) for x in m["discounts"]]
        if self.kind[1] == 3:
            self._read_trigrams()

    def level_values(self, packed: str, codebook: str, rest: str, count: int) -> np.ndarray:
        """The stored values of a quantised level: §7.17 (version 1), §7.18 (version 2)."""
        a = self.a
        assert self.q is not None
        if self.quant_version == 2:
            return quant2_values(self.raw(packed), a[codebook], self.raw(rest), self.q, count)
        if len(a[rest]):
            raise FormatError(f"{rest} not empty")
        return quant_values(a[packed], a[codebook], self.q, count)

    def _expand_ngram_16(self, rows: np.ndarray) -> None:
        """§7.18: HIST, HDRI/HDRV, HN13 (and TDRI/TDRV) of a 1.6 file from its sequences;
        the checks of §7.11–7.16 then run on them. META dropped_contexts gives D₂ (and D₃)."""
        a, n, m = self.a, self.n, self.meta
        d = m.get("dropped_contexts")
        if not (isinstance(d, list) and len(d) == m["order"] - 1 and all(type(x) is int for x in d)
                and 0 <= d[0] <= n + 3 and (len(d) == 1 or 0 <= d[1] <= m["bigrams"])):
            raise FormatError(f"META dropped_contexts = {d!r}")
        a["HIST"] = self.prefix_sums("HSE", n + 3)
        a["HDRI"] = np.array(self.ef("HDI", d[0], strict=True), dtype=np.int64)
        a["HDRV"] = self.prefix_sums("HDV", d[0], positive=True)
        if "N1EH" in a:  # N₁, N₂ per row; N₃₊ = row length − N₁ − N₂
            n1, n2 = self.prefix_sums("N1E", n + 3), self.prefix_sums("N2E", n + 3)
            n3 = np.diff(rows) - n1 - n2
            if np.any(n3 < 0):
                raise FormatError("N1E/N2E count more entries than a row has")
            a["HN13"] = np.column_stack([n1, n2, n3]).reshape(-1)
        if "TDIH" in a:
            a["TDRI"] = np.array(self.ef("TDI", d[1], strict=True), dtype=np.int64)
            a["TDRV"] = self.prefix_sums("TDV", d[1], positive=True)

    def _read_trigrams(self) -> None:
        a, n, m = self.a, self.n, self.meta
        c, t = m["trigram_contexts"], m["trigrams"]
        if m["trigram_summary_min"] != SUMMARY_MIN:
            raise FormatError("trigram_summary_min")
        b = m["bigrams"]
        if self.version == (1, 6):
            all_starts, lens = self._trigram_lists_16(b, t)
        else:
            # §7.14: a context is a bigram entry; TLEN (escapes as §7.12) gives its number of trigrams
            lens = a["TLEN"].astype(np.int64)
            tlei = a["TLEI"].astype(np.int64)
            if len(lens) != b or not np.array_equal(np.flatnonzero(lens == ESCAPE), tlei) or len(a["TLEV"]) != len(tlei):
                raise FormatError("TLEN/TLEI/TLEV")
            if np.any(a["TLEV"] < ESCAPE):
                raise FormatError("TLEV")
            lens[tlei] = a["TLEV"]
            all_starts = np.concatenate([[0], np.cumsum(lens)])
            if len(a["TCTB"]) != b // 16 + 1 or not np.array_equal(a["TCTB"], all_starts[: b + 1 : 16]) or all_starts[-1] != t:
                raise FormatError("TCTB")
        self.lengths = lens
        self.all_starts = all_starts
        self.ctx_entry = np.flatnonzero(lens)  # the bigram entry of each context, in order
        if len(self.ctx_entry) != c:
            raise FormatError("trigram_contexts")
        self.starts = np.concatenate([all_starts[self.ctx_entry], [t]])
        if self.q is not None:  # §7.17, §7.18: codes into the trigram codebook
            if len(a["TSUC"]) != t:
                raise FormatError("TSUC")
            val = self.level_values("TVAL", "TBGI", "TBGC", t)
        else:  # §7.12: the exact codec
            val = a["TVAL"].astype(np.int64)
            tbgi = a["TBGI"].astype(np.int64)
            if len(val) != t or len(a["TSUC"]) != t or np.any(val == 0) or not np.array_equal(np.flatnonzero(val == ESCAPE), tbgi):
                raise FormatError("TVAL/TBGI")
            if len(a["TBGC"]) != len(tbgi) or np.any(a["TBGC"] < ESCAPE):
                raise FormatError("TBGC")
            val[tbgi] = a["TBGC"]
        self.tval = val
        owner = np.repeat(np.arange(c), np.diff(self.starts))
        if np.any(np.diff(owner * (n + 2) + a["TSUC"].astype(np.int64)) <= 0) or np.any(a["TSUC"] >= n + 2):
            raise FormatError("TSUC")
        # §7.15: summaries of the long contexts, dropped mass
        sums = np.bincount(owner, weights=val, minlength=c).astype(np.int64)
        long_ctx = np.flatnonzero(np.diff(self.starts) > SUMMARY_MIN)
        if not np.array_equal(a["TLNI"], self.ctx_entry[long_ctx]):  # §7.15: by bigram entry index
            raise FormatError("TLNI")
        tlnv = a["TLNV"].reshape(-1, 4)
        for i, j in enumerate(long_ctx.tolist()):
            vals = val[self.starts[j] : self.starts[j + 1]]
            want = [int(sums[j]), int((vals == 1).sum()), int((vals == 2).sum()), int((vals >= 3).sum())]
            if tlnv[i].tolist() != want:
                raise FormatError("TLNV")
        tdri = a["TDRI"].astype(np.int64)
        if len(tdri) != len(a["TDRV"]) or np.any(np.diff(tdri) <= 0) or np.any(tdri >= b) or np.any(lens[tdri[tdri < b]] == 0) \
                or np.any(a["TDRV"] < 1):
            raise FormatError("TDRI/TDRV")
        self.dropped3 = np.zeros(b, dtype=np.int64)  # by bigram entry
        self.dropped3[tdri] = a["TDRV"]

    def _trigram_lists_16(self, b: int, t: int) -> tuple[np.ndarray, np.ndarray]:
        """§7.18: start(0 … b) from TPTH/TPTB, and TSUC rebuilt from the remapped successors
        of TEFH/TEFB (x = Y − B_i, position = SUCC[ROWS[v] + x]); returns (starts, lengths)."""
        a, n = self.a, self.n
        starts = np.array(self.ef("TPT", b + 1, strict=False), dtype=np.int64)
        if starts[0] != 0 or starts[-1] != t:
            raise FormatError("TPT does not run from 0 to t")
        y = self.ef("TEF", t, strict=True)
        rows, succ = a["ROWS"], a["SUCC"]
        tsuc = np.zeros(t, dtype=np.int64)
        self.remapped: list[tuple[int, int, list[int]]] = []  # (bigram entry i, B_i, [x …]) per context (§10.9)
        for i in range(b):
            s, e = int(starts[i]), int(starts[i + 1])
            if s == e:
                continue
            base = 0 if s == 0 else y[s - 1] + 1
            v = int(a["ALPH"][succ[i]])  # the context (u, v) is bigram entry i: v is its successor
            xs = [y[j] - base for j in range(s, e)]
            length = int(rows[v + 1] - rows[v])
            if min(xs) < 0 or max(xs) >= length:
                raise FormatError(f"remapped successor outside the row of {v}")
            tsuc[s:e] = succ[int(rows[v]) + np.array(xs)]
            self.remapped.append((i, base, xs))
        a["TSUC"] = tsuc
        return starts, np.diff(starts)

    def full_counts(self) -> np.ndarray:
        if self.coded:
            return self._counts  # §7.17: the stored (decoded) values
        return super().full_counts()

    def floor(self, w: int) -> float:  # §9.7 P1
        u = self.a["UNIG"]
        if self.kind[0] == "jm":
            return int(u[w]) / self.total
        d = self.d[0]
        n1, n2, n3 = int((u == 1).sum()), int((u == 2).sum()), int((u >= 3).sum())
        g0 = (d[0] * n1 + d[1] * n2 + d[2] * n3) / self.total
        a = int(u[w])
        return max(a - self._disc(a, d), 0.0) / self.total + g0 * (1.0 / (self.n + 2))

    @staticmethod
    def _disc(a: int, d: list[float]) -> float:
        return 0.0 if a == 0 else d[0] if a == 1 else d[1] if a == 2 else d[2]

    def _mix(self, a: int, total: int, dropped: int, n123: tuple[int, int, int], order: int, lower: float) -> float:
        if self.kind[0] == "kn":  # §9.7: r first in γ
            d = self.d[order - 1]
            gamma = (dropped + d[0] * n123[0] + d[1] * n123[1] + d[2] * n123[2]) / total
            return max(a - self._disc(a, d), 0.0) / total + gamma * lower
        lam = self.meta["lambda"] if order == 2 else self.meta["lambda3"]
        return lam * (a / total) + ((1.0 - lam) + lam * (dropped / total)) * lower

    def lower(self, v: int, w: int) -> float:
        """§9.7 B(v, w): the bigram level's score."""
        a = self.a
        p = self.floor(w)
        total = int(a["HIST"][v])
        if total:
            n123 = tuple(int(x) for x in a["HN13"][3 * v : 3 * v + 3]) if self.kind[0] == "kn" else (0, 0, 0)
            p = self._mix(self.pair_count(v, w), total, int(self.dropped2[v]), n123, 2, p)  # type: ignore[arg-type]
        return p

    def context(self, u: int, v: int) -> int:
        """§7.14: the bigram entry of (u, v) if it is a trigram context, else −1."""
        s, e = int(self.a["ROWS"][u]), int(self.a["ROWS"][u + 1])
        succ = self.a["SUCC"][s:e].tolist()
        p = int(self.a["APOS"][v])
        if p not in succ:
            return -1
        i = s + succ.index(p)
        return i if self.lengths[i] else -1

    def prob3(self, ctx: tuple[int, ...], w: int) -> float:
        """§9.7 for a context of ids (u, v) or (v,)."""
        a = self.a
        p = self.lower(ctx[-1], w)
        if self.kind[1] == 3 and len(ctx) == 2:
            j = self.context(ctx[0], ctx[1])
            if j >= 0:
                s, e = int(self.all_starts[j]), int(self.all_starts[j]) + int(self.lengths[j])
                succ = a["TSUC"][s:e].tolist()
                vals = self.tval[s:e]
                pos = int(a["APOS"][w])
                c3 = int(vals[succ.index(pos)]) if pos in succ else 0
                n123 = (int((vals == 1).sum()), int((vals == 2).sum()), int((vals >= 3).sum()))
                dropped = int(self.dropped3[j])
                p = self._mix(c3, int(vals.sum()) + dropped, dropped, n123, 3, p)
        return p

    def check_trigram_bands(self) -> int:
        """§7.16 by brute force: every segment's band and counts from the dominance rule; returns #segments."""
        a, K = self.a, self.meta["skyband_k"]
        segs, sege = a["TSGS"].astype(np.int64), a["TSGE"].astype(np.int64)
        skyp, skyi, skyc = a["TSKP"].astype(np.int64), a["TSKI"].astype(np.int64), a["TSKC"].astype(np.int64)
        ctx_v = a["ALPH"][a["SUCC"][self.ctx_entry].astype(np.int64)].astype(np.int64)  # each context's v
        for i, (s, e) in enumerate(zip(segs.tolist(), sege.tolist())):
            j = int(np.searchsorted(self.starts, s, side="right") - 1)
            assert self.starts[j] <= s < e <= self.starts[j + 1]
            v = int(ctx_v[j])
            pos = a["TSUC"][s:e].tolist()
            ids = [int(a["ALPH"][p]) for p in pos]
            b = [self.lower(v, i) for i in ids]
            c3 = self.tval[s:e].tolist()
            ahead = lambda x, w: (-b[x], ids[x]) < (-b[w], ids[w])  # noqa: E731
            doms = [sum(1 for x in range(e - s) if x != w and c3[x] >= c3[w] and ahead(x, w)) for w in range(e - s)]
            want = sorted((d, o) for o, d in enumerate(doms) if d < K)
            assert skyi[skyp[i] : skyp[i + 1]].tolist() == [o for _, o in want], i
            assert skyc[i * K : (i + 1) * K].tolist() == [sum(1 for d, _ in want if d < q) for q in range(1, K + 1)], i
        return len(segs)

    def brute_rank(self, ctx: tuple[int, ...], prefix: str, k: int) -> list[tuple[str, float]]:
        scored = [(self.prob3(ctx, w), w) for w in range(self.n) if self.keys[w].startswith(prefix)]
        scored.sort(key=lambda t: (-t[0], t[1]))  # §9.6: ties by the smaller id
        return [(self.keys[w], p) for p, w in scored[:k]]


def _ctx_ids(r: NgramReader, history: list[str]) -> tuple[int, ...]:
    ids = [r.n + 2 if t == "<s>" else r.history_id(t) for t in history]
    if r.n + 2 in ids:
        ids = ids[len(ids) - 1 - ids[::-1].index(r.n + 2):]
    return tuple(ids[-(r.kind[1] - 1):])


@pytest.mark.parametrize("smoothing,order,bands", [("kn", 2, 4), ("kn", 3, 4), ("jm", 3, 4), ("kn", 3, 64), ("jm", 3, 2)])
def test_ngram_files_follow_sections_7_11_to_7_16_and_9_7(tmp_path: Path, smoothing: str, order: int, bands: int) -> None:
    path = tmp_path / "m.nwm"
    # "of the" gets more than 64 successors: its sums are stored (§7.15), its row has a band (§7.16)
    wide = [f"Of the {w}." for w in _syllable_words(70)]
    nextword.train_texts(REAL + wide, path, smoothing=smoothing, order=order, min_count=1, skyband_min=bands, skyband_k=3)
    r = NgramReader(path)
    model = nextword.load(path)
    assert r.kind == (smoothing, order) == (model.estimator, model.order)
    if order == 3:
        assert r.check_trigram_bands() > 0
        assert len(r.a["TLNI"]) > 0  # the stored summaries are read too
    rng = random.Random(5)
    words = [r.keys[i] for i in range(min(r.n, 60))]
    ctxs = [["<s>"], ["<s>", "i"], ["i", "am"], ["the", "zzz"], ["<unk>", "<unk>"], ["of", "the"], ["<s>", "the"]]
    ctxs += [[rng.choice(words), rng.choice(words)] for _ in range(8)]
    for hist in ctxs:
        ids = _ctx_ids(r, hist)
        total = 0.0
        for w in range(r.n + 2):
            key = "</s>" if w == r.n else "<unk>" if w == r.n + 1 else r.keys[w]
            p = r.prob3(ids, w)
            assert model.prob_after(key, hist) == pytest.approx(p, rel=1e-12, abs=0), (hist, key)
            total += p
        assert total == pytest.approx(1.0, rel=1e-9)
        for prefix in ["", "s", "t", "a", "re"]:
            for k in (1, 3, 5):
                got = model.rank_after(hist, prefix, k)
                want = r.brute_rank(ids, prefix, k)
                assert [k for k, _ in got] == [k for k, _ in want], (hist, prefix)


def test_worked_kn_trigram_example() -> None:
    # §10.7: retrain the example, compare the quoted arrays and the hand computation
    import tempfile

    text = DOC.read_text(encoding="utf-8")
    part = text[text.index("### 10.7") : text.index("### 10.8")]
    first, second = part.split("**A trigram skyband.**")

    def quoted(chunk: str) -> dict[str, list[int]]:
        return {m.group(1): [int(x) for x in m.group(2).split(",") if x.strip()]
                for m in re.finditer(r"^([A-Z0-9]{4}) = \[([^\]]*)\]$", chunk, re.M)}  # fmt: skip

    q1, q2 = quoted(first), quoted(second)
    assert set(q1) == {"UNIG", "HIST", "HN13", "TCTB", "TLEN", "TSUC", "TVAL", "TSKP"}
    assert set(q2) == {"TSGS", "TSGE", "TSKP", "TSKI", "TSKC"}
    msgs = ["I am Sam.", "Sam I am.", "I do not like green eggs and ham."]
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "ex.nwm"
        nextword.train_texts(msgs, path, smoothing="kn", order=3, min_count=1)
        r = NgramReader(path)
        for tag, values in q1.items():
            assert r.a[tag].tolist() == values, tag
        for tag in ("HDRI", "HDRV", "TDRI", "TDRV", "TBGI", "TBGC", "TLEI", "TLEV", "TLNI", "TLNV", "TSGS", "TSGE", "TSKI", "TSKC"):
            assert len(r.a[tag]) == 0, tag  # the text says these are empty
        assert r.id_type == "u16"
        assert r.a["ROWS"].tolist() == [0, 2, 4, 6, 7, 8, 9, 10, 11, 12, 13, 13, 13, 15]  # quoted in the text
        assert r.a["SUCC"].tolist() == [0, 2, 6, 10, 9, 10, 5, 8, 1, 3, 10, 4, 7, 6, 9]
        assert r.keys[:10] == ["i", "sam", "am", "and", "do", "eggs", "green", "ham", "like", "not"]
        assert r.d == [[2 / 3] * 3, [13 / 17] * 3, [0.5] * 3]
        # P(sam | i am) = 1/4 + (1/2)(2/17 + (13/17)(7/54)) = 329/918
        assert r.prob3((0, 2), 1) == pytest.approx(329 / 918, rel=1e-12)
        model = nextword.load(path)
        top = model.suggest("I am ", 3)
        assert [s.word for s in top] == ["Sam", "I", "am"]  # display spellings (§7.10)
        assert [round(s.prob, 6) for s in top] == [0.358388, 0.049564, 0.024074]
        banded = Path(d) / "band.nwm"
        nextword.train_texts(msgs, banded, smoothing="kn", order=3, min_count=1, skyband_min=1, skyband_k=2)
        r2 = NgramReader(banded)
        for tag, values in q2.items():
            assert r2.a[tag].tolist() == values, tag
        assert r2.check_trigram_bands() == 1


# ---------------------------------------------------------------------------------------
# Format 1.5 (§7.17): the same layout with quantised values, read by the reader above.


@pytest.mark.parametrize("smoothing,order,bits", [("jm", 2, 2), ("kn", 2, 3), ("kn", 3, 2), ("jm", 3, 5), ("kn", 3, 7)])
def test_quantised_files_follow_section_7_17(tmp_path: Path, smoothing: str, order: int, bits: int) -> None:
    path = tmp_path / "q.nwm"
    wide = [f"Of the {w}." for w in _syllable_words(70)]
    nextword.train_texts(REAL + wide, path, smoothing=smoothing, order=order, min_count=1, skyband_min=4, skyband_k=3,
                         quantize=bits)
    r = NgramReader(path)
    model = nextword.load(path)
    assert r.version == (1, 5) and r.q == bits and r.kind == (smoothing, order)
    counts = r.full_counts()
    cb = r.a["BIGI"]
    assert set(counts.tolist()) <= set(cb.tolist()) and len(cb) <= 1 << bits
    if bits <= 3:  # the Sam pairs (300, 150) and the rare ones cannot all keep their own value
        exact = NgramReader(_exact_twin(tmp_path, smoothing, order, wide))
        assert len(np.unique(exact.full_counts())) > len(cb)
    # §7.9 with the stored values: every bigram segment's band by brute force
    a, K = r.a, r.meta["skyband_k"]
    segs = list(zip(a["SEGS"].tolist(), a["SEGE"].tolist()))
    assert segs
    for i, (s, e) in enumerate(segs):
        ids = [int(a["ALPH"][a["SUCC"][j]]) for j in range(s, e)]
        _, band, skyc = _brute_band(ids, counts[s:e].tolist(), K)
        assert a["SKYI"][a["SKYP"][i] : a["SKYP"][i + 1]].tolist() == band, i
        assert a["SKYC"][i * K : (i + 1) * K].tolist() == skyc, i
    if order == 3:
        assert r.check_trigram_bands() > 0
    rng = random.Random(7)
    words = [r.keys[i] for i in range(min(r.n, 60))]
    ctxs = [["<s>"], ["i"], ["am"], ["of", "the"], ["<s>", "i"], ["i", "am"], ["<unk>", "<unk>"]]
    ctxs += [[rng.choice(words), rng.choice(words)] for _ in range(6)]
    for hist in ctxs:
        ids = _ctx_ids(r, hist)
        total = 0.0
        for w in range(r.n + 2):
            key = "</s>" if w == r.n else "<unk>" if w == r.n + 1 else r.keys[w]
            p = r.prob3(ids, w)
            assert model.prob_after(key, hist) == pytest.approx(p, rel=1e-12, abs=0), (hist, key)
            total += p
        assert total == pytest.approx(1.0, rel=1e-9)  # §7.17: every context still sums to 1
        for prefix in ["", "s", "t", "a", "re"]:
            for k in (1, 3, 5):
                got = model.rank_after(hist, prefix, k)
                want = r.brute_rank(ids, prefix, k)
                assert [k for k, _ in got] == [k for k, _ in want], (hist, prefix)


def _exact_twin(tmp_path: Path, smoothing: str, order: int, wide: list[str]) -> Path:
    path = tmp_path / "exact.nwm"
    if (smoothing, order) == ("jm", 2):  # the exact JM bigram is a 1.0 file: compare a KN bigram's rows instead
        smoothing = "kn"
    nextword.train_texts(REAL + wide, path, smoothing=smoothing, order=order, min_count=1, skyband_min=4, skyband_k=3)
    return path


def test_worked_quantised_example(tmp_path: Path) -> None:
    # §10.8: retrain the example, compare the quoted arrays, the bit arithmetic and the hand computation
    text = DOC.read_text(encoding="utf-8")
    part = text[text.index("### 10.8") : text.index("### 10.9")]
    quoted = {m.group(1): [int(x) for x in m.group(2).split(",") if x.strip()]
              for m in re.finditer(r"^([A-Z0-9]{4}) = \[([^\]]*)\]$", part, re.M)}  # fmt: skip
    assert set(quoted) == {"CNTS", "BIGI", "BIGC", "HIST"}
    msgs = ["I am Sam."] * 9 + ["Sam I am."] * 4 + ["I do not like green eggs and ham."] * 3
    path = tmp_path / "q.nwm"
    nextword.train_texts(msgs, path, min_count=1, quantize=2)
    r = NgramReader(path)
    assert r.meta["codec"] == {"name": "quant", "version": 1, "bits": 2} and "lambda3" not in r.meta
    for tag, values in quoted.items():
        assert r.a[tag].tolist() == values, tag
    assert len(r.a["HDRI"]) == len(r.a["HDRV"]) == 0
    assert r.a["UNIG"].tolist() == [16, 13, 13, 3, 3, 3, 3, 3, 3, 3, 16, 0]
    assert r.a["SUCC"].tolist() == [0, 2, 9, 10, 6, 10, 5, 8, 1, 3, 10, 4, 7, 6, 9]  # as §10.3
    # the exact counts quoted in the text, and their stored values
    assert r.full_counts().tolist() == [13, 3, 9, 4, 4, 9, 3, 3, 3, 3, 3, 3, 3, 13, 4]
    assert r.keys[:3] == ["i", "am", "sam"]
    assert r.prob3((0,), 1) == pytest.approx(0.9 * 13 / 16 + 0.1 * 13 / 79, rel=1e-15)
    assert r.prob3((r.n + 2,), 0) == pytest.approx(0.9 * 13 / 17 + 0.1 * 16 / 79, rel=1e-15)
    model = nextword.load(path)
    assert model.prob("am", "i") == pytest.approx(0.7477056962, abs=1e-10)
    assert model.prob("i", None) == pytest.approx(0.708488, abs=1e-6)
    # the q = 5 example of §7.17: code 3 is bits 15..19, (B[1] + 256·B[2]) >> 7, low 5 bits
    codes = [17, 5, 30, 22, 9]
    stream = sum(c << (5 * i) for i, c in enumerate(codes)).to_bytes(4, "little")
    assert ((stream[1] + 256 * stream[2]) >> 7) & 31 == 22
    assert quant_values(np.frombuffer(stream, dtype=np.uint8), np.arange(1, 33, dtype=np.uint32), 5, 5).tolist() == [c + 1 for c in codes]


# ---------------------------------------------------------------------------------------
# Format 1.6 (§7.18): compressed successor lists, read by the reader above (ef_decode).


def file_sections(path: str | Path) -> tuple[int, list[tuple[str, int, bytes]]]:
    """(minor version, [(tag, element code, bytes)]) of a file, in table order (§3, §4)."""
    data = Path(path).read_bytes()
    _, _, minor, count, *_ = HEADER.unpack_from(data, 0)
    out = []
    for i in range(count):
        tag, code, _, off, length, _, _ = ENTRY.unpack_from(data, HEADER.size + i * ENTRY.size)
        out.append((tag.decode("ascii"), code, data[off : off + length]))
    return minor, out


def write_file(minor: int, sections: list[tuple[str, int, bytes]]) -> bytes:
    """§11 and §2–4: lay ``sections`` out from offset 32 + 32·S, each padded to 8 bytes, with
    every CRC (used to craft damaged files whose checksums are right)."""
    table_end = HEADER.size + ENTRY.size * len(sections)
    body, table, off = b"", b"", table_end
    for tag, code, data in sections:
        table += ENTRY.pack(tag.encode("ascii"), code, b"\0\0\0", off, len(data), zlib.crc32(data), b"\0" * 4)
        padded = data + bytes(-len(data) % 8)
        body += padded
        off += len(padded)
    head = HEADER.pack(MAGIC, 1, minor, len(sections), off, zlib.crc32(table), 0)[:28]
    return head + struct.pack("<I", zlib.crc32(head)) + table + body


def _doc_part(start: str, end: str) -> str:
    text = DOC.read_text(encoding="utf-8")
    return text[text.index(start) : text.index(end)]


def _bits(stream: bytes, start: int, stop: int) -> list[int]:
    """§7.18 (as §7.17): stream bit p is bit (p mod 8) of byte ⌊p/8⌋."""
    return [(stream[p // 8] >> (p % 8)) & 1 for p in range(start, stop)]


SEQUENCES_16 = ("UNE", "RWE", "SEF", "HSE", "HDI", "HDV", "N1E", "N2E", "TPT", "TEF", "TDI", "TDV")  # §10.9's file
REPLACED_14 = {"IDTK", "APOS", "UNIG", "ROWS", "SUCC", "HIST", "HDRI", "HDRV", "HN13",
               "TCTB", "TLEN", "TLEI", "TLEV", "TSUC", "TDRI", "TDRV"}  # fmt: skip


def _ones(stream: bytes, stop: int) -> list[int]:
    return [q for q, b in enumerate(_bits(stream, 0, stop)) if b]


def test_worked_compact_example(tmp_path: Path) -> None:
    # §10.9: retrain §10.7's model with compact=True, compare the quoted header, table,
    # sections, bit strings, decoded sequences and the hand decodes with the file
    part = _doc_part("### 10.9", "## 11.")
    msgs = ["I am Sam.", "Sam I am.", "I do not like green eggs and ham."]
    path, plain = tmp_path / "c.nwm", tmp_path / "p.nwm"
    nextword.train_texts(msgs, path, smoothing="kn", order=3, min_count=1, compact=True)
    nextword.train_texts(msgs, plain, smoothing="kn", order=3, min_count=1)
    data = path.read_bytes()
    (want_head,) = re.findall(r"^compact-header-hex: ([0-9a-f]{64})$", part, re.M)
    assert data[:32].hex() == want_head, f"regenerate docs/FORMAT.md §10.9 (new header: {data[:32].hex()})"
    assert len(data) == 7224 and plain.stat().st_size == 7016  # quoted in the text
    r, p = NgramReader(path), NgramReader(plain)
    assert r.version == (1, 6) and p.version == (1, 4)
    assert r.meta["codec"] == {"name": "exact", "version": 1} and r.meta["successors"] == SUCCESSORS_16
    # the section table, row by row
    rows = re.findall(r"^\| `(0x[0-9a-f]+)` \| `(\w{4})` \| (\d) \((\w+)\) \| `(0x[0-9a-f]+)` \((\d+)\) \| (\d+) \| `([0-9a-f]{8})` \| (\d+) \|",
                      part, re.M)  # fmt: skip
    assert len(rows) == len(r.entries) == 51 and len(p.entries) == 43
    ends = [e.offset + e.length for e in r.entries]
    nxt = [e.offset for e in r.entries[1:]] + [len(data)]
    for i, (row, e) in enumerate(zip(rows, r.entries)):
        at, tag, code, _, off, off_dec, length, crc, pad = row
        assert (int(at, 16), tag, int(code), int(off, 16), int(off_dec), int(length), int(crc, 16), int(pad)) == (
            32 + 32 * i, e.tag, e.code, e.offset, e.offset, e.length, e.crc, nxt[i] - ends[i]), tag
    new = {name + s for name in SEQUENCES_16 for s in "HB"}
    assert set(r.sections) == set(p.sections) - REPLACED_14 | new and len(new) == 24 and len(REPLACED_14) == 16
    for tag in set(r.sections) - new - {"META"}:  # "every other section holds the same bytes"
        assert r.raw(tag) == p.raw(tag), tag
    extra = bytes.fromhex("aa73756363657373 6f7273 82a46e616d65a26566a776657273696f6e01")
    extra2 = b"\xb0dropped_contexts\x92\x00\x00"
    assert len(extra) == 29 and len(extra2) == 20
    assert len(r.raw("META")) == len(p.raw("META")) + 49 == 773 and extra in r.raw("META") and extra2 in r.raw("META")
    assert r.meta["dropped_contexts"] == [0, 0]
    assert (r.meta["trigram_skyband_min"], p.meta["trigram_skyband_min"]) == (r.meta["skyband_min"], 24) == (64, 24)
    skip = {"successors", "dropped_contexts", "trigram_skyband_min"}
    assert {k: v for k, v in r.meta.items() if k not in skip} == {k: v for k, v in p.meta.items() if k not in skip}
    # the sequence table: N, H, r₀, ⌊r₀/m₀⌋, ℓ₀, the size sum and the stream's bytes
    counts = dict(zip(SEQUENCES_16, [r.n + 3, r.n + 4, 15, r.n + 4, 0, 1, r.n + 4, r.n + 4, 16, 14, 0, 1]))
    table = re.findall(r"^\| `(\w{3})` \([^|]*\) \| (\d+) \| ([0-9, ]+) \|([^|]*)\|([^|]*)\|([^|]*)\|([^|]*)\| (\d+) \+ 8 \|$",
                       part, re.M)  # fmt: skip
    assert [t[0] for t in table] == list(SEQUENCES_16)
    for name, count, head_s, r0, quot, low, size, nbytes in table:
        h = r.a[name + "H"].tolist()
        assert int(count) == counts[name] and [int(x) for x in head_s.split(",")] == h, name
        assert len(r.raw(name + "B")) == int(nbytes) + EF_PAD == -(-h[-1] // 8) + EF_PAD, name
        if counts[name]:
            rr, m = h[2] - h[0], counts[name]
            assert (int(r0), int(quot), int(low)) == (rr, rr // m, ef_low_width(rr, m)), name
            terms = [int(x) for x in re.findall(r"\d+", size)]
            lw = ef_low_width(rr, m)
            assert terms == [m * lw, rr >> lw, m, h[3]], name
        else:
            assert not (r0 + quot + low + size).strip() and h == [0, 0], name
    # the quoted sections: headers as numbers, streams as hex bytes
    block = re.search(r"^compact-sections:\n(.*?)^```", part, re.M | re.S)
    assert block
    quoted_lists = dict(re.findall(r"^(\w{4}) = \[([0-9, ]*)\]$", block.group(1), re.M))
    quoted_hex = dict(re.findall(r"^(\w{4}): ([0-9a-f ]+)$", block.group(1), re.M))
    assert set(quoted_lists) == {s + "H" for s in SEQUENCES_16} and set(quoted_hex) == {s + "B" for s in SEQUENCES_16}
    for tag, values in quoted_lists.items():
        assert r.a[tag].tolist() == [int(x) for x in values.split(",")], tag
    for tag, hexes in quoted_hex.items():
        assert r.raw(tag) == bytes.fromhex(hexes), tag
    # the bit strings: low parts in groups of ℓ, then the high region, from bit 0
    strings = re.findall(r"^(\w{3})?\s+(low|high)\s+([01 ]+)$", part, re.M)
    shown: dict[str, str] = {}
    name = ""
    for seq, kind, bits in strings:
        name = seq or name
        shown[name] = shown.get(name, "") + bits.replace(" ", "")
    assert set(shown) == {"UNE", "RWE", "SEF", "HSE", "N1E", "N2E", "TPT", "TEF"}
    for name in shown:
        h = r.a[name + "H"].tolist()
        assert shown[name] == "".join(map(str, _bits(r.raw(name + "B"), 0, h[3]))), name
    for name in ("HDV", "TDV"):  # "the single high bits 10"
        assert "".join(map(str, _bits(r.raw(name + "B"), 0, r.a[name + "H"][3]))) == "10"
    # decoded sequences equal §10.7's arrays
    rows_q = [0, 2, 4, 6, 7, 8, 9, 10, 11, 12, 13, 13, 13, 15]
    assert r.ef("RWE", 14, strict=False) == rows_q == p.a["ROWS"].tolist()
    y2 = [0, 2, 18, 22, 33, 34, 41, 56, 61, 75, 94, 100, 115, 150, 153]
    assert r.ef("SEF", 15, strict=True) == y2
    assert r.a["SUCC"].tolist() == [0, 2, 6, 10, 9, 10, 5, 8, 1, 3, 10, 4, 7, 6, 9] == p.a["SUCC"].tolist()
    une = [0, 2, 4, 5, 6, 7, 8, 9, 10, 11, 12, 15, 15]
    assert r.ef("UNE", 13, strict=False) == une and une[-1] == r.total
    assert r.a["UNIG"].tolist() == [2, 2, 1, 1, 1, 1, 1, 1, 1, 1, 3, 0] == p.a["UNIG"].tolist() == np.diff(une).tolist()
    hse = [0, 3, 5, 7, 8, 9, 10, 11, 12, 13, 14, 14, 14, 17]
    assert r.ef("HSE", 14, strict=False) == hse
    assert r.a["HIST"].tolist() == [3, 2, 2, 1, 1, 1, 1, 1, 1, 1, 0, 0, 3] == p.a["HIST"].tolist() == np.diff(hse).tolist()
    starts = [0, 2, 3, 4, 4, 5, 5, 6, 7, 8, 9, 9, 10, 11, 13, 14]
    assert r.ef("TPT", 16, strict=False) == starts and np.diff(starts).tolist() == p.a["TLEN"].tolist()
    remapped = _doc_arrays("compact-remapped")
    assert r.ef("TEF", 14, strict=True) == remapped["Y3"]
    assert [i for i, _, _ in r.remapped] == remapped["CTX"]
    assert [base for _, base, _ in r.remapped] == remapped["BASE"]
    assert [x for _, _, xs in r.remapped for x in xs] == remapped["X"]
    assert r.a["TSUC"].tolist() == remapped["TSUC"] == p.a["TSUC"].tolist()
    for tag in ("IDTK", "APOS", "HN13", "HDRI", "HDRV", "TDRI", "TDRV"):
        assert r.a[tag].tolist() == p.a[tag].tolist(), tag
    assert r.ef("HDI", 0, strict=True) == r.ef("TDI", 0, strict=True) == [] and r.ef("HDV", 1, strict=True) == [0]
    # the hand decodes of the text
    sef = r.raw("SEFB")
    low13 = sum(b << j for j, b in enumerate(_bits(sef, 39, 42)))
    ones = [q for q, b in enumerate(_bits(sef, 45, 79)) if b]
    assert (low13, ones) == (6, [0, 1, 4, 5, 8, 9, 11, 14, 15, 18, 21, 23, 26, 31, 33])
    assert ones[13] - 13 == 18 and 18 * 2**3 + 6 == 150 == y2[13] and 150 - 12 * (r.n + 2) == 6 == r.a["APOS"][0]
    assert _ones(r.raw("RWEB"), 30)[13] == 28
    une_ones = _ones(r.raw("UNEB"), 29)
    assert une_ones[:2] == [0, 3] and une_ones[10:12] == [22, 26] and (26 - 11) - (22 - 10) == 3 == r.a["UNIG"][10]
    assert _ones(r.raw("HSEB"), 32)[12:] == [26, 30] and (30 - 13) - (26 - 12) == 3 == r.a["HIST"][12]
    assert _ones(r.raw("HSEB"), 32)[2:4] == [7, 10] and (10 - 3) - (7 - 2) == 2 == r.a["HIST"][2]
    n1, n2 = _ones(r.raw("N1EB"), 28), _ones(r.raw("N2EB"), 17)
    assert n1[:2] == n2[:2] == [0, 2] and n1[12:] == [24, 26] and n2[12:] == [13, 15]
    assert r.a["HN13"][[0, 1, 2, 6, 7, 8, 36, 37, 38]].tolist() == [1, 1, 0, 2, 0, 0, 1, 1, 0]
    tpt_ones = _ones(r.raw("TPTB"), 31)
    assert tpt_ones[13:] == [24, 27, 29]
    tef_ones = _ones(r.raw("TEFB"), 29)
    assert tef_ones[8:] == [17, 19, 21, 23, 25, 27]
    # P(sam | i am), and the library reads the same file
    assert r.prob3((0, 2), 1) == p.prob3((0, 2), 1) == pytest.approx(329 / 918, rel=1e-12)
    model = nextword.load(path)
    assert model.format_version == (1, 6)
    assert [(s.word, round(s.prob, 6)) for s in model.suggest("I am ", 3)] == [("Sam", 0.358388), ("I", 0.049564), ("am", 0.024074)]
    # the same model with quantize=2: the quant codec version 2 (§7.18), by hand
    qpath = tmp_path / "q.nwm"
    nextword.train_texts(msgs, qpath, smoothing="kn", order=3, min_count=1, quantize=2, compact=True)
    qdata = qpath.read_bytes()
    (want_q,) = re.findall(r"^compact-quant-header-hex: ([0-9a-f]{64})$", part, re.M)
    assert qdata[:32].hex() == want_q, f"regenerate docs/FORMAT.md §10.9 (new header: {qdata[:32].hex()})"
    rq = NgramReader(qpath)
    assert len(qdata) == 7368 and len(rq.entries) == 51
    assert rq.meta["codec"] == {"name": "quant", "version": 2, "bits": 2} and rq.quant_version == 2
    values = {"CNTS", "BIGI", "BIGC", "TVAL", "TBGI", "TBGC"}
    assert [e.tag for e in rq.entries] == [e.tag for e in r.entries]
    for tag in set(rq.sections) - values - {"META"}:
        assert rq.raw(tag) == r.raw(tag), tag
    qblock = re.search(r"^compact-quant-sections:\n(.*?)^```", part, re.M | re.S)
    assert qblock
    for tag, hexes, zeros in re.findall(r"^(\w{4}): ([0-9a-f ]+?) \+ (\d+) × 00$", qblock.group(1), re.M):
        assert rq.raw(tag) == bytes.fromhex(hexes) + bytes(int(zeros)) and len(rq.raw(tag)) == ONES_BLOCK_BYTES, tag
    qlists = dict(re.findall(r"^(\w{4}) = \[([0-9, ]*)\]$", qblock.group(1), re.M))
    assert set(qlists) == {"BIGI", "BIGC", "TBGI", "TBGC"}
    for tag, vals in qlists.items():
        assert rq.a[tag].tolist() == [int(x) for x in vals.split(",") if x.strip()], tag
    bitmap = rq.raw("CNTS")
    assert struct.unpack_from("<I", bitmap, 0)[0] == 0 and (bitmap[4], bitmap[5]) == (0xFE, 0x5F)
    set_before_13 = sum(_bits(bitmap[4:], 0, 13))
    assert _bits(bitmap[4:], 13, 14) == [0] and set_before_13 == 12 and 13 - 0 - set_before_13 == 1
    code1 = sum(b << j for j, b in enumerate(_bits(rq.raw("BIGC"), 2, 4)))
    assert code1 == 1 and rq.a["BIGI"][code1] == 2 == rq.full_counts()[13] == r.full_counts()[13]
    assert np.array_equal(rq.full_counts(), r.full_counts()) and np.array_equal(rq.tval, r.tval)  # without loss
    assert rq.full_counts().tolist() == [2] + [1] * 12 + [2, 1]
    assert rq.prob3((0, 2), 1) == pytest.approx(329 / 918, rel=1e-12)
    assert nextword.load(qpath).suggest("I am ", 3) == model.suggest("I am ", 3)


COMPACT_KINDS = [("jm", 2, None), ("kn", 2, 5), ("kn", 3, None), ("kn", 3, 4)]


@pytest.mark.parametrize("smoothing,order,bits", COMPACT_KINDS)
def test_compact_files_answer_like_their_plain_twins(tmp_path: Path, smoothing: str, order: int, bits: int | None) -> None:
    # §7.18: "the same model as a 1.4 or 1.5 file of the same kind": the doc's reader
    # decodes the sequences into the arrays of the plain file, and the reader's and the
    # library's probabilities and rankings on the 1.6 file equal those on the plain one
    wide = [f"Of the {w}." for w in _syllable_words(70)]
    opts = dict(smoothing=smoothing, order=order, min_count=1, skyband_min=4, skyband_k=3, quantize=bits)
    path, twin = tmp_path / "c.nwm", tmp_path / "p.nwm"
    nextword.train_texts(REAL + wide, path, compact=True, **opts)  # type: ignore[arg-type]
    nextword.train_texts(REAL + wide, twin, **opts)  # type: ignore[arg-type]
    r, model, plain = NgramReader(path), nextword.load(path), nextword.load(twin)
    assert r.version == model.format_version == (1, 6) and r.kind == (smoothing, order) and r.q == bits
    plain_minor = 0 if (smoothing, order, bits) == ("jm", 2, None) else 4 if bits is None else 5
    assert plain.format_version == (1, plain_minor)
    assert len(r.a["RWEH"]) > 4 and len(r.a["SEFH"]) > 4  # several chunks
    rp = NwmReader(twin) if plain_minor == 0 else NgramReader(twin)
    for tag in ("ROWS", "SUCC", "IDTK", "APOS", *(("HN13",) if smoothing == "kn" else ()), *(("TSUC",) if order == 3 else ())):
        assert r.a[tag].tolist() == rp.a[tag].tolist(), tag
    assert np.array_equal(r.full_counts(), rp.full_counts())
    if order == 3:
        assert len(r.a["TEFH"]) > 4 and r.check_trigram_bands() > 0
        assert np.array_equal(r.lengths, rp.lengths) and np.array_equal(r.tval, rp.tval)  # type: ignore[attr-defined]
    rng = random.Random(16)
    words = [r.keys[i] for i in range(min(r.n, 60))]
    ctxs = [["<s>"], ["i"], ["the"], ["of", "the"], ["<s>", "i"], ["i", "am"], ["<unk>", "<unk>"], ["the", "zzz"]]
    ctxs += [[rng.choice(words), rng.choice(words)] for _ in range(5)]
    for hist in ctxs:
        ids = _ctx_ids(r, hist)
        total = 0.0
        for w in range(r.n + 2):
            key = "</s>" if w == r.n else "<unk>" if w == r.n + 1 else r.keys[w]
            got = r.prob3(ids, w)
            if plain_minor:
                assert got == rp.prob3(ids, w), (hist, key)  # type: ignore[attr-defined]
            else:  # the 1.0 twin: §9.3, the same numbers by another formula
                assert got == pytest.approx(rp.prob(ids[-1], w, rp.lam), rel=1e-12), (hist, key)
            lib = model.prob_after(key, hist)
            assert lib == plain.prob_after(key, hist), (hist, key)
            assert lib == pytest.approx(got, rel=1e-12, abs=0), (hist, key)
            total += got
        assert total == pytest.approx(1.0, rel=1e-9)
        for prefix in ["", "s", "t", "a", "re"]:
            for k in (1, 3, 5):
                got_rank = model.rank_after(hist, prefix, k)
                assert got_rank == plain.rank_after(hist, prefix, k), (hist, prefix, k)
                assert [w for w, _ in got_rank] == [w for w, _ in r.brute_rank(ids, prefix, k)], (hist, prefix, k)
    for word, before in (("am", "i"), ("the", None), ("i", "<unk>"), ("zzz", "of")):
        assert model.prob(word, before) == plain.prob(word, before)
    for typed in ("", "I ", "I am ", "of the ", "of the b", "The assert st", "Sam I a"):
        assert model.suggest(typed, 4) == plain.suggest(typed, 4), typed


# §7.18 and the encoder nextword.succinct.ef_encode: any non-decreasing sequence (runs of
# equal values, gaps from 0 to millions, 0 … 300 values: zero to five chunks)
@st.composite
def _gaps(draw: st.DrawFn) -> list[int]:
    size = draw(st.integers(0, 300))  # drawn first, so that long (several-chunk) sequences are common
    gap = st.one_of(st.just(0), st.integers(1, 3), st.integers(0, 1000), st.integers(0, 1 << 22))
    return draw(st.lists(gap, min_size=size, max_size=size))


@settings(max_examples=120, deadline=None)
@given(start=st.integers(0, 1 << 20), gaps=_gaps())
def test_the_doc_decoder_reads_the_library_encoder(start: int, gaps: list[int]) -> None:
    from nextword.succinct import ef_encode  # the writer under test; the decoder is the doc's

    values = list(itertools.accumulate(gaps, initial=start))[1:]
    head, stream = ef_encode(np.array(values, dtype=np.int64))
    strict = all(b > a for a, b in zip(values, values[1:]))
    assert ef_decode(head.tolist(), bytes(stream), len(values), strict=strict) == values  # the doc, §7.18
    # and §7.18 written the other way round gives the same bytes: the text fixes the layout
    assert ef_encode_doc(values) == (head.tolist(), bytes(stream))


@pytest.fixture(scope="module")
def compact_kn3(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A KN trigram model of the real text as 1.6 (exact, and quant version 2), and as 1.4
    and 1.5 (for the cases that need a plain file): every long sequence has several chunks."""
    d = tmp_path_factory.mktemp("compact")
    wide = [f"Of the {w}." for w in _syllable_words(70)]
    out = {}
    for name, extra in (("c", {"compact": True}), ("q", {"compact": True, "quantize": 4}), ("p14", {}), ("p15", {"quantize": 4})):
        out[name] = d / f"{name}.nwm"
        nextword.train_texts(REAL + wide, out[name], smoothing="kn", order=3, min_count=1, skyband_min=4, skyband_k=3,
                             **extra)  # type: ignore[arg-type]
    return out


Sections = dict[str, list]  # tag -> [element code, bytes], in table order


def _craft(src: Path, dst: Path, edit: Callable[[Sections, dict], int | None]) -> Path:
    """A copy of ``src`` changed by ``edit`` (sections and META; it may return another
    minor version), laid out again by §11 with every CRC right."""
    minor, listed = file_sections(src)
    secs: Sections = {tag: [code, data] for tag, code, data in listed}
    meta = msgpack.unpackb(secs["META"][1], raw=False)
    minor = edit(secs, meta) or minor
    secs["META"][1] = msgpack.packb(meta, use_bin_type=True)
    dst.write_bytes(write_file(minor, [(tag, code, data) for tag, (code, data) in secs.items()]))
    return dst


def _head(secs: Sections, name: str) -> list[int]:
    code, data = secs[name + "H"]
    return np.frombuffer(data, dtype="<u4" if code == 3 else "<u8").tolist()


def _set_head(secs: Sections, name: str, head: list[int]) -> None:
    secs[name + "H"] = [3, np.array(head, dtype="<u4").tobytes()]


def _set_seq(secs: Sections, name: str, values: list[int]) -> None:
    """Code ``values`` by §7.18 (a valid coding of a wrong sequence)."""
    head, stream = ef_encode_doc(values)
    _set_head(secs, name, head)
    secs[name + "B"] = [1, stream]


def _seq(secs: Sections, name: str, count: int) -> list[int]:
    return ef_decode(_head(secs, name), secs[name + "B"][1], count, strict=False)


def _flip(stream: bytes, p: int) -> bytes:
    b = bytearray(stream)
    b[p // 8] ^= 1 << (p % 8)
    return bytes(b)


def _chunk_parts(head: list[int], values: list[int], c: int) -> tuple[int, int, int, list[int], list[int]]:
    """(m, ℓ, O_c, highs, lows) of chunk c (§7.18)."""
    m = min(EF_CHUNK, len(values) - EF_CHUNK * c)
    low = ef_low_width(head[2 * c + 2] - head[2 * c], m)
    d = [y - head[2 * c] for y in values[EF_CHUNK * c : EF_CHUNK * c + m]]
    return m, low, head[2 * c + 1], [x >> low for x in d], [x & ((1 << low) - 1) for x in d]


def _set_bits(stream: bytes, start: int, width: int, value: int) -> bytes:
    for j in range(width):
        if ((stream[(start + j) // 8] >> ((start + j) % 8)) & 1) != (value >> j) & 1:
            stream = _flip(stream, start + j)
    return stream


def _swap_lows(secs: Sections, name: str, count: int) -> None:
    """Make the sequence decrease: swap the low parts of two neighbours with equal high parts."""
    head, stream = _head(secs, name), secs[name + "B"][1]
    values = _seq(secs, name, count)
    for c in range(len(head) // 2 - 1):
        m, low, off, highs, lows = _chunk_parts(head, values, c)
        for k in range(m - 1):
            if low and highs[k] == highs[k + 1] and lows[k] < lows[k + 1]:
                stream = _set_bits(stream, off + k * low, low, lows[k + 1])
                secs[name + "B"][1] = _set_bits(stream, off + (k + 1) * low, low, lows[k])
                return
    raise AssertionError(f"no two neighbours of {name} to swap")


def _beyond_chunk(secs: Sections, name: str, count: int) -> int:
    """Make the last value of a chunk decode above F_{c+1} (§7.18: it must be ≤ F_{c+1}); its index."""
    head, stream = _head(secs, name), secs[name + "B"][1]
    values = _seq(secs, name, count)
    for c in range(len(head) // 2 - 1):
        m, low, off, highs, lows = _chunk_parts(head, values, c)
        r = head[2 * c + 2] - head[2 * c]
        if low and r % (1 << low) < (1 << low) - 1:
            region = off + m * low
            stream = _flip(stream, region + highs[-1] + m - 1)  # the last value's high bit …
            stream = _flip(stream, region + (r >> low) + m - 1)  # … moved to the region's end
            secs[name + "B"][1] = _set_bits(stream, off + (m - 1) * low, low, (1 << low) - 1)
            return EF_CHUNK * c + m - 1
    raise AssertionError(f"no chunk of {name} to damage")


def _history(r: NwmReader, v: int) -> str:
    return "<s>" if v == r.n + 2 else "<unk>" if v == r.n + 1 else r.keys[v]


def _ask_all(model: nextword.Model, hist: list[str], r: NwmReader) -> None:
    for w in [*r.keys, "</s>", "<unk>"]:
        model.prob_after(w, hist)
    model.rank_after(hist, "", 5)


def _pop(d: dict, key: str) -> None:
    del d[key]


def _pop_all(d: dict, *keys: str) -> None:
    for key in keys:
        del d[key]


def _add_successors(secs: Sections, meta: dict) -> None:
    meta["successors"] = dict(SUCCESSORS_16)


def _h(name: str, change: Callable[[list[int]], None]) -> Callable[[Sections, dict], None]:
    def edit(secs: Sections, meta: dict) -> None:
        head = _head(secs, name)
        change(head)
        _set_head(secs, name, head)
    return edit


def _counts(meta: dict) -> dict[str, int]:
    """N of every sequence (§7.18's table)."""
    n, b = meta["n_words"], meta["bigrams"]
    d2, d3 = meta["dropped_contexts"]
    return {"RWE": n + 4, "SEF": b, "TPT": b + 1, "TEF": meta["trigrams"], "UNE": n + 3, "HSE": n + 4,
            "N1E": n + 4, "N2E": n + 4, "HDI": d2, "HDV": d2 + 1, "TDI": d3, "TDV": d3 + 1}


def _reseq(name: str, change: Callable[[list[int], dict], None]) -> Callable[[Sections, dict], None]:
    def edit(secs: Sections, meta: dict) -> None:
        values = _seq(secs, name, _counts(meta)[name])
        change(values, meta)
        _set_seq(secs, name, values)
    return edit


def _set(values: list[int], i: int, x: int) -> None:
    values[i] = x


def _past_end(secs: Sections, meta: dict) -> None:
    for name in ("RWE", "SEF", "TPT", "TEF"):
        end = _head(secs, name)[-1]
        if end % 8:
            secs[name + "B"][1] = _flip(secs[name + "B"][1], end)  # a bit of the last byte, after O_C
            return
    raise AssertionError("every stream ends on a byte boundary")


def _retype(tag: str, code: int) -> Callable[[Sections, dict], None]:
    def edit(secs: Sections, meta: dict) -> None:
        secs[tag][0] = code
    return edit


def _n1_above_row(secs: Sections, meta: dict) -> None:
    """N₁ of row 0 = its length + 1 (re-coded validly: only N₃₊ = length − N₁ − N₂ < 0 shows it)."""
    rows = _seq(secs, "RWE", meta["n_words"] + 4)
    cum = _seq(secs, "N1E", meta["n_words"] + 4)
    x = np.diff(cum)
    x[0] = rows[1] - rows[0] + 1
    _set_seq(secs, "N1E", [0, *itertools.accumulate(x.tolist())])


def _id_array(tag: str, i: int, value: Callable[[np.ndarray, dict], int]) -> Callable[[Sections, dict], None]:
    def edit(s: Sections, meta: dict) -> None:
        a = np.frombuffer(s[tag][1], dtype="<u2").copy()
        a[i] = value(a, meta)
        s[tag][1] = a.tobytes()
    return edit


def _dropped3(idx: int | None, cum: list[int]) -> Callable[[Sections, dict], None]:
    """One trigram context with dropped mass: TDI = [idx] (None: b, past the last bigram entry), TDV = cum."""
    def edit(secs: Sections, meta: dict) -> None:
        meta["dropped_contexts"] = [meta["dropped_contexts"][0], 1]
        _set_seq(secs, "TDI", [meta["bigrams"] if idx is None else idx])
        _set_seq(secs, "TDV", cum)
    return edit


def _bitmap(edit: Callable[[bytearray, dict], None]) -> Callable[[Sections, dict], None]:
    def run(secs: Sections, meta: dict) -> None:
        b = bytearray(secs["CNTS"][1])
        edit(b, meta)
        secs["CNTS"][1] = bytes(b)
    return run


def _set_bit_after_n(b: bytearray, meta: dict) -> None:
    j = meta["bigrams"] % ONES_BLOCK  # the first bit past the last n-gram (of the last block)
    assert j, "the bigram level fills its last block"
    b[len(b) - ONES_BLOCK_BYTES + 4 + j // 8] |= 1 << (j % 8)


def _code_tail(secs: Sections, meta: dict) -> None:
    """A bit after the last code of BIGC (the words' unused high bits)."""
    w = np.frombuffer(secs["BIGC"][1], dtype="<u4").copy()
    q = meta["codec"]["bits"]
    bitmap = secs["CNTS"][1]
    blocks = len(bitmap) // ONES_BLOCK_BYTES
    last = bitmap[(blocks - 1) * ONES_BLOCK_BYTES :]
    ones = struct.unpack_from("<I", last, 0)[0] + sum(bin(x).count("1") for x in last[4:])
    tail = (meta["bigrams"] - ones) * q % 32
    assert tail, "the codes fill their last word"
    w[-1] |= np.uint32(1 << tail)
    secs["BIGC"][1] = w.tobytes()


# docs/FORMAT.md §8 items 19–26 (format 1.6, checks on every load): one damaged file per
# check, CRCs fixed; (source file, edit, the library's message). A plain load refuses it.
LOAD_CASES: dict[str, tuple[str, Callable[[Sections, dict], int | None], str]] = {
    "19 successors missing": ("c", lambda s, m: _pop(m, "successors"), "'successors' belongs to format 1.6"),
    "19 successors version 2": ("c", lambda s, m: m.update(successors={"name": "ef", "version": 2}), "unknown successor layout"),
    "19 successors name": ("c", lambda s, m: m.update(successors={"name": "pef", "version": 1}), "unknown successor layout"),
    "19 successors in 1.4": ("p14", _add_successors, "'successors' belongs to format 1.6"),
    "19 successors in 1.5": ("p15", _add_successors, "'successors' belongs to format 1.6"),
    "19 dropped_contexts missing": ("c", lambda s, m: _pop(m, "dropped_contexts"), "'dropped_contexts' is invalid"),
    "19 dropped_contexts of order 2": ("c", lambda s, m: m.update(dropped_contexts=[0]), "'dropped_contexts' is invalid"),
    "19 D2 above n+3": ("c", lambda s, m: m.update(dropped_contexts=[m["n_words"] + 4, 0]), "'dropped_contexts' is invalid"),
    "19 D3 above b": ("c", lambda s, m: m.update(dropped_contexts=[0, m["bigrams"] + 1]), "'dropped_contexts' is invalid"),
    "20 a sequence missing": ("c", lambda s, m: _pop(s, "SEFB"), "missing sections SEFB"),
    "20 N1E missing": ("c", lambda s, m: _pop_all(s, "N1EH", "N1EB"), "missing sections"),
    "20 HN13 in a 1.6 file": ("c", lambda s, m: s.update(HN13=[3, bytes(12 * (m["n_words"] + 3))]), "unexpected sections"),
    "20 HIST in a 1.6 file": ("c", lambda s, m: s.update(HIST=[3, bytes(4 * (m["n_words"] + 3))]), "unexpected sections"),
    "20 TSUC in a 1.6 file": ("c", lambda s, m: s.update(TSUC=[2, bytes(2 * m["trigrams"])]), "unexpected sections"),
    "20 stream not u8": ("c", _retype("TEFB", 2), "TEFB has element type"),
    "20 header not u32/u64": ("c", _retype("SEFH", 2), "SEFH has element type"),
    "20 prefix-sum header not u32/u64": ("c", _retype("HSEH", 2), "HSEH has element type"),
    "20 quant version 2 in a 1.5 file": ("p15", lambda s, m: m["codec"].update(version=2), "version 2 belongs to format 1.6"),
    "22 RWE header entries": ("c", _h("RWE", lambda h: h.extend(h[-2:])), "RWEH/RWEB has .* header entries"),
    "22 SEF header entries": ("c", _h("SEF", lambda h: h.extend(h[-2:])), "SEFH/SEFB has .* header entries"),
    "22 TPT header entries": ("c", _h("TPT", lambda h: h.extend(h[-2:])), "TPTH/TPTB has .* header entries"),
    "22 TEF header entries": ("c", _h("TEF", lambda h: h.extend(h[-2:])), "TEFH/TEFB has .* header entries"),
    "22 UNE header entries": ("c", _h("UNE", lambda h: h.extend(h[-2:])), "UNEH/UNEB has .* header entries"),
    "22 TDV header entries": ("c", _h("TDV", lambda h: h.extend(h[-2:])), "TDVH/TDVB has .* header entries"),
    "22 HDI of N = 0 ends above 0": ("c", _h("HDI", lambda h: _set(h, 0, 1)), "HDIH/HDIB (is empty but ends|chunk offsets)"),
    "22 O0 not 0": ("c", _h("SEF", lambda h: _set(h, 1, 1)), "chunk offsets do not start at 0"),
    "22 stream length": ("c", lambda s, m: s["SEFB"].__setitem__(1, s["SEFB"][1] + bytes(8)), r"SEFH/SEFB stream has \d+ bytes"),
    "22 bit past the end": ("c", _past_end, "stream has bits set past its end"),
    "22 padding": ("c", lambda s, m: s["RWEB"].__setitem__(1, s["RWEB"][1][:-1] + b"\x80"), "RWEH/RWEB stream padding"),
    "22 TEF padding": ("c", lambda s, m: s["TEFB"].__setitem__(1, s["TEFB"][1][:-1] + b"\x80"), "TEFH/TEFB stream padding"),
    "23 RWE O decreasing": ("c", _h("RWE", lambda h: _set(h, 3, h[5] + 1)), "RWEH/RWEB chunk offsets do not start at 0 and increase"),
    "23 HSE F decreasing": ("c", _h("HSE", lambda h: _set(h, 2, h[4] + 1)), "HSEH/HSEB chunk first values are not increasing"),
    "23 UNE chunk size": ("c", _h("UNE", lambda h: _set(h, 3, h[3] + 1)), r"UNEH/UNEB chunk 0 has \d+ bits, its values need"),
    "23 N2E chunk size": ("c", _h("N2E", lambda h: _set(h, len(h) - 1, h[-1] + 1)), r"N2EH/N2EB chunk \d+ has \d+ bits"),
    "23 HDV last chunk shorter than m": ("c", _h("HDV", lambda h: _set(h, len(h) - 2, h[-4])), "HDVH/HDVB chunk first values"),
    "24 ROWS does not end at b": ("c", _reseq("RWE", lambda v, m: _set(v, -1, m["bigrams"] - 1)), "row starts are not increasing"),
    "24 ROWS does not start at 0": ("c", _reseq("RWE", lambda v, m: _set(v, 0, 1)), "row starts are not increasing"),
    "24 ROWS decreasing": ("c", lambda s, m: _swap_lows(s, "RWE", m["n_words"] + 4), "row starts are not increasing"),
    "24 UNE not from 0": ("c", _reseq("UNE", lambda v, m: v.__setitem__(slice(None), [x + 1 for x in v])), "UNEH/UNEB do not hold prefix sums from 0"),
    "24 HSE not from 0": ("c", _reseq("HSE", lambda v, m: v.__setitem__(slice(None), [x + 1 for x in v])), "HSEH/HSEB do not hold prefix sums from 0"),
    "24 TPT does not start at 0": ("c", _reseq("TPT", lambda v, m: v.__setitem__(slice(None), [x + 1 for x in v])), "TPTH/TPTB do not run from 0"),
    "24 TPT does not end at t": ("c", _reseq("TPT", lambda v, m: _set(v, -1, m["trigrams"] - 1)), "TPTH/TPTB do not run from 0"),
    "24 SEF past the last row": ("c", _reseq("SEF", lambda v, m: _set(v, -1, (m["n_words"] + 3) * (m["n_words"] + 2))), "past the last row"),
    "24 TDI past b": ("c", _dropped3(None, [0, 1]), "TDIH/TDVH do not index bigram entries"),
    "24 TDV not from 0": ("c", _dropped3(0, [1, 2]), "TDIH/TDVH do not index bigram entries, or their sums do not start at 0"),
    "25 TKID not a permutation": ("c", _id_array("TKID", 1, lambda a, m: int(a[0])), "TKID"),
    "25 ALPH not a permutation": ("c", _id_array("ALPH", 0, lambda a, m: m["n_words"] + 2), "ALPH is not a valid permutation"),
    "26 bitmap length": ("q", lambda s, m: s["CNTS"].__setitem__(1, s["CNTS"][1] + bytes(ONES_BLOCK_BYTES)), r"section CNTS holds \d+ bytes, expected"),
    "26 first rank": ("q", _bitmap(lambda b, m: b.__setitem__(0, 1)), "ranks that do not start at 0"),
    "26 bit after the last n-gram": ("q", _bitmap(_set_bit_after_n), "bits set after the last n-gram"),
    "26 code section length": ("q", lambda s, m: s["BIGC"].__setitem__(1, s["BIGC"][1] + bytes(4)), r"section BIGC holds \d+ words, expected"),
    "26 bits after the last code": ("q", _code_tail, "BIGC has non-zero bits after the last code"),
    "26 codebook not increasing": ("q", lambda s, m: s["BIGI"].__setitem__(1, s["BIGI"][1][4:8] + s["BIGI"][1][4:]), "not a strictly increasing codebook"),
}


def test_the_crafting_writer_reproduces_the_file(compact_kn3: dict[str, Path], tmp_path: Path) -> None:
    # §11 (and §2–4) rebuild the library's file byte for byte, so the damaged files below
    # differ from it only by their edit
    for name, src in compact_kn3.items():
        assert _craft(src, tmp_path / f"{name}.nwm", lambda s, m: None).read_bytes() == src.read_bytes(), name


@pytest.mark.parametrize("case", list(LOAD_CASES))
def test_compact_load_checks(compact_kn3: dict[str, Path], tmp_path: Path, case: str) -> None:
    src, edit, message = LOAD_CASES[case]
    path = _craft(compact_kn3[src], tmp_path / "bad.nwm", edit)
    with pytest.raises(nextword.ModelFormatError, match=message):
        nextword.load(path)
    with pytest.raises(FormatError):  # the doc's reader refuses it too
        NgramReader(path)


def test_compact_checksums(compact_kn3: dict[str, Path], tmp_path: Path) -> None:
    # §8 item 21: the vocabulary-sized sequences are checksummed on every load, the
    # n-gram-sized ones only with verify=True (a flipped stream bit keeps every header check)
    data = compact_kn3["c"].read_bytes()
    r = NgramReader(compact_kn3["c"])
    on_load = ("RWEH", "RWEB", "UNEB", "HSEB", "N1EB", "N2EH", "HDVB", "HDIH")
    for tag in (*on_load, "SEFB", "TPTB", "TEFB", "TDVB"):
        b = bytearray(data)
        b[r.sections[tag].offset] ^= 0x01  # bit 0 of the first byte (the first low or high bit)
        path = tmp_path / f"{tag}.nwm"
        path.write_bytes(bytes(b))
        with pytest.raises(FormatError, match=f"{tag} CRC"):
            NwmReader(path)
        if tag in on_load:
            with pytest.raises(nextword.ModelFormatError, match=f"section {tag} checksum"):
                nextword.load(path)
        else:
            nextword.load(path).close()
            with pytest.raises(nextword.ModelFormatError, match=f"section {tag} checksum"):
                nextword.load(path, verify=True)


def _entry_history(r: NgramReader, i: int) -> list[str]:
    """The two-word history (u, v) of bigram entry i (§7.14: a trigram context is a bigram entry)."""
    u = int(np.searchsorted(r.a["ROWS"], i, side="right")) - 1
    return [_history(r, u), _history(r, int(r.a["ALPH"][r.a["SUCC"][i]]))]


def _bad_position(secs: Sections, meta: dict, r: NgramReader) -> list[str]:
    """The last entry of a word's row decodes to position n+2 (still below the next row's values)."""
    n, rows, y = r.n, r.a["ROWS"].tolist(), _seq(secs, "SEF", meta["bigrams"])
    for v in range(n):
        last = rows[v + 1] - 1
        if rows[v] <= last and last + 1 < len(y) and y[last + 1] > (v + 1) * (n + 2):
            y[last] = (v + 1) * (n + 2)
            _set_seq(secs, "SEF", y)
            return [r.keys[v]]
    raise AssertionError("no row to damage")


def _bad_x(secs: Sections, meta: dict, r: NgramReader) -> list[str]:
    """The last trigram successor of the last context gets x = the length of its row."""
    i, base, xs = r.remapped[-1]
    v = int(r.a["ALPH"][r.a["SUCC"][i]])
    y = _seq(secs, "TEF", meta["trigrams"])
    y[-1] = base + int(r.a["ROWS"][v + 1] - r.a["ROWS"][v])
    _set_seq(secs, "TEF", y)
    return _entry_history(r, i)


def _bad_chunk(secs: Sections, meta: dict, r: NgramReader) -> list[str]:
    i = _beyond_chunk(secs, "SEF", meta["bigrams"])
    return [_history(r, int(np.searchsorted(r.a["ROWS"], i, side="right")) - 1)]


def _bad_high_bits(secs: Sections, meta: dict, r: NgramReader) -> list[str]:
    """Chunk 0 of SEF loses a set bit of its high region (m − 1 values left)."""
    head, values = _head(secs, "SEF"), _seq(secs, "SEF", meta["bigrams"])
    m, low, off, highs, _ = _chunk_parts(head, values, 0)
    secs["SEFB"][1] = _flip(secs["SEFB"][1], off + m * low + highs[0])
    return [r.keys[0]]


def _header(name: str, change: Callable[[list[int]], None], hist: Callable[[NgramReader], list[str]]
            ) -> Callable[[Sections, dict, NgramReader], list[str]]:
    """A chunk header of an n-gram-sized sequence changed: §8 item 27 finds it when the chunk is decoded."""
    def edit(secs: Sections, meta: dict, r: NgramReader) -> list[str]:
        _h(name, change)(secs, meta)
        return hist(r)
    return edit


def _first_context(r: NgramReader) -> list[str]:
    return _entry_history(r, int(r.ctx_entry[0]))


def _last_context(r: NgramReader) -> list[str]:
    return _entry_history(r, int(r.ctx_entry[-1]))


def _n3_below_zero(secs: Sections, meta: dict, r: NgramReader) -> list[str]:
    _n1_above_row(secs, meta)
    return [r.keys[0]]


def _dropped_zero(secs: Sections, meta: dict, r: NgramReader) -> list[str]:
    """The first trigram context gets a dropped mass of 0 (TDV prefix sums [0, 0]: not strict)."""
    i = int(r.ctx_entry[0])
    _dropped3(i, [0, 0])(secs, meta)
    return _entry_history(r, i)


# §7.18 / §8 items 27–28, checks when a chunk is decoded: a plain load opens the file, a
# query that decodes the damaged chunk refuses it, and so does verify=True; (edit, message)
DECODE_CASES: dict[str, tuple[Callable[[Sections, dict, NgramReader], list[str]], str]] = {
    "27 SEF O decreasing": (_header("SEF", lambda h: _set(h, 3, h[5] + 1), lambda r: [r.keys[0]]), "does not decode to its values"),
    "27 SEF chunk shorter than m": (_header("SEF", lambda h: _set(h, 2, h[0] + 63), lambda r: [r.keys[0]]), "does not decode to its values"),
    "27 TPT F decreasing": (_header("TPT", lambda h: _set(h, 2, h[4] + 1), _first_context), "does not decode to its values"),
    "27 TEF chunk shorter than m": (_header("TEF", lambda h: _set(h, 2, h[0] + 63), _first_context), "does not decode to its values"),
    "27 TEF last chunk size": (_header("TEF", lambda h: _set(h, len(h) - 1, h[-1] + 1), _last_context), "does not decode to its values"),
    "27 a value above F_c+1": (_bad_chunk, "does not decode to its values"),
    "27 m_c - 1 high bits": (_bad_high_bits, "does not decode to its values"),
    "28 a position past n+1": (_bad_position, "outside the positions"),
    "28 an x past its row": (_bad_x, "outside the row of its last word"),
    "28 N3+ below 0": (_n3_below_zero, "counts more entries than it has"),
    "28 a dropped mass of 0": (_dropped_zero, "holds a value below 1|does not decode to its values"),
}


@pytest.mark.parametrize("case", list(DECODE_CASES))
def test_compact_decode_checks(compact_kn3: dict[str, Path], tmp_path: Path, case: str) -> None:
    edit, message = DECODE_CASES[case]
    r = NgramReader(compact_kn3["c"])
    hist: list[str] = []
    path = _craft(compact_kn3["c"], tmp_path / "bad.nwm", lambda s, m: hist.extend(edit(s, m, r)))
    model = nextword.load(path)  # the load checks pass: opening does not decode these values
    with pytest.raises(nextword.ModelFormatError, match=message):
        _ask_all(model, hist, r)
    with pytest.raises(nextword.ModelFormatError):
        nextword.load(path, verify=True)
    with pytest.raises(FormatError):
        NgramReader(path)


def _quant_rank(secs: Sections, meta: dict) -> None:
    """Block 1's rank one too high (the ones before it): seen only with verify=True."""
    b = bytearray(secs["CNTS"][1])
    at = ONES_BLOCK_BYTES  # block 1
    b[at : at + 4] = struct.pack("<I", struct.unpack_from("<I", b, at)[0] + 1)
    secs["CNTS"][1] = bytes(b)


def _quant_code(secs: Sections, meta: dict) -> None:
    """The first code of BIGC set to the codebook's length (past it), if the codebook has room."""
    q, cb = meta["codec"]["bits"], np.frombuffer(secs["BIGI"][1], dtype="<u4")
    assert len(cb) < 1 << q, "a full codebook"
    w = np.frombuffer(secs["BIGC"][1], dtype="<u4").copy()
    w[0] = (int(w[0]) & ~((1 << q) - 1)) | len(cb)
    secs["BIGC"][1] = w.tobytes()


def test_compact_quant_checks(tmp_path: Path) -> None:
    # §7.18, the quant codec version 2: a middle block's rank and a code are checked with
    # verify=True; a plain load opens the file (the last block's rank is checked on load,
    # through M: test_compact_load_checks)
    src = tmp_path / "q.nwm"
    wide = [f"Of the {w}." for w in _syllable_words(400)]
    nextword.train_texts(REAL + wide, src, smoothing="kn", order=3, min_count=1, quantize=4, compact=True)
    r = NgramReader(src)
    assert r.quant_version == 2 and len(r.raw("CNTS")) >= 3 * ONES_BLOCK_BYTES  # a middle block
    for name, edit in (("rank", _quant_rank), ("code", _quant_code)):
        path = _craft(src, tmp_path / f"{name}.nwm", edit)
        nextword.load(path).close()
        with pytest.raises(nextword.ModelFormatError, match="rank that is not the ones before it" if name == "rank" else "code past the codebook"):
            nextword.load(path, verify=True)
        with pytest.raises(FormatError):
            NgramReader(path)


def test_compact_headers_may_be_u64(compact_kn3: dict[str, Path], tmp_path: Path) -> None:
    # §7.18: "…H (element type u32 or u64, declared in the section table)": the same file
    # with every header widened to u64 is read by both readers with the same answers
    def widen(secs: Sections, meta: dict) -> None:
        for name in _counts(meta):
            secs[name + "H"] = [4, np.array(_head(secs, name), dtype="<u8").tobytes()]

    path = _craft(compact_kn3["c"], tmp_path / "wide.nwm", widen)
    r, r32 = NgramReader(path), NgramReader(compact_kn3["c"])
    assert r.sections["SEFH"].code == 4 and r.sections["SEFH"].length == 2 * r32.sections["SEFH"].length
    for tag in ("ROWS", "SUCC", "TSUC"):
        assert np.array_equal(r.a[tag], r32.a[tag]), tag
    wide, narrow = nextword.load(path, verify=True), nextword.load(compact_kn3["c"])
    for hist in (["<s>"], ["of", "the"], ["i", "am"], ["<s>", "i"]):
        assert wide.rank_after(hist, "", 5) == narrow.rank_after(hist, "", 5)
        assert [wide.prob_after(w, hist) for w in r.keys[:50]] == [narrow.prob_after(w, hist) for w in r.keys[:50]]
