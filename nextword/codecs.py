"""How one level's stored values become section arrays, and how a query reads them back.

The store lays out n-grams (rows of successors per context); a *codec* owns only the
numbers stored beside them. The file records the codec by name and version in META
(``"codec": {"name": ..., "version": ...}``, format 1.4); a reader refuses a codec it
does not know, by name. Each level's values live in sections whose tags the store
chooses (``CNTS``/``BIGI``/``BIGC`` for the bigram level, ``TVAL``/``TBGI``/``TBGC`` for
the trigram level), so one codec class serves every level.

``exact`` stores the integer values themselves (raw counts for Jelinek-Mercer, adjusted
counts for Kneser-Ney): one byte per n-gram, 255 marking an escape whose full value sits
in a sorted side table (index, value). The estimator turns them into α and γ at query
time. A quantised codec (issue 15) is a second class: its :meth:`Codec.encode` gets the
same values plus the estimator's α per n-gram, stores codes and a codebook, and its view
answers :meth:`ValueView.at` with what the scorer needs; ``stores_alpha`` tells the
scorer which of the two it reads (docs/SEAMS.md, "codec").
"""

from __future__ import annotations

import bisect
from abc import ABC, abstractmethod
from typing import ClassVar, Final

import numpy as np

from .errors import InvalidArgumentError, ModelFormatError

__all__ = ["Codec", "ValueView", "ExactCodec", "EXACT", "COUNT_ESCAPE", "codec_named", "CODECS"]

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
    version: ClassVar[int]
    #: False: the view yields integer values the estimator turns into α and γ;
    #: True: it yields α directly (a quantised codec), with γ stored per context.
    stores_alpha: ClassVar[bool] = False

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
    def decode(self, where: str, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes]) -> ValueView:
        """The query-side view over the mapped sections (no copy of the n-gram-sized ones)."""

    def meta(self) -> dict[str, object]:
        """What META records about the codec."""
        return {"name": self.name, "version": self.version}


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
    version: ClassVar[int] = 1

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

    def decode(self, where: str, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes]) -> ValueView:
        small, esc_i, esc_v = (arrays[t.decode()] for t in tags)
        return _ExactView(where, small, esc_i, esc_v)


EXACT: Final = ExactCodec()
#: every codec a file may name (name → instance)
CODECS: Final[dict[str, Codec]] = {EXACT.name: EXACT}


def codec_named(where: str, spec: object) -> Codec:
    """The codec META's ``codec`` field names; ModelFormatError for one this library lacks."""
    if not isinstance(spec, dict):
        raise ModelFormatError(f"{where}: metadata field 'codec' is invalid: {spec!r}"[:200])
    name, version = spec.get("name"), spec.get("version")
    codec = CODECS.get(name) if isinstance(name, str) else None
    if codec is None:
        raise ModelFormatError(f"{where}: unknown value codec {name!r} (this library reads: {', '.join(CODECS)})"[:200])
    if isinstance(version, bool) or version != codec.version:
        raise ModelFormatError(f"{where}: codec {name!r} version {version!r} is not supported (this library reads version {codec.version})"[:200])
    return codec
