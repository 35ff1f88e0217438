"""The native C runtime reads format 1.6 (chunked Elias-Fano successor lists) exactly like the Python library.

Two references. For the sequence coder alone: ``nextword.succinct`` (``ef_encode`` writes a
sequence, ``ChunkedEF`` reads it, ``ef_check_headers`` is its load check; docs/FORMAT.md §7.18
gives the bit layout), compared value by value with native/src/ef.c through the ``nwef`` tool
built with AddressSanitizer and UndefinedBehaviorSanitizer. For whole files: ``nextword.Model``
on the same 1.6 file, with the helpers, the ctypes binding and the hostile-file machinery of
tests/test_native.py (imported, not copied). Skipped like tests/test_native.py when the library
cannot be built (unless NEXTWORD_REQUIRE_NATIVE=1).
"""

from __future__ import annotations

import random
import subprocess
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from nextword.errors import ModelFormatError
from nextword.succinct import CHUNK, ChunkedEF, ef_check_headers, ef_encode

from test_native import _make, build_dir  # noqa: F401 - build_dir is a fixture used here


@pytest.fixture(scope="module")
def ef_tool(build_dir: Path) -> Path:
    _make(build_dir, "ef-tool", "ZLIB=0", timeout=600)  # the same sanitizer objects as `make fuzz ZLIB=0`
    return build_dir / "nwef"


def _run(tool: Path, tmp: Path, head: np.ndarray, hw: int, stream: np.ndarray, n: int, strict: bool,
         queries: list[str]) -> list[str]:
    """nwef on one sequence (header written with ``hw`` bytes per entry); its output lines."""
    (tmp / "h").write_bytes(np.asarray(head, dtype="<u4" if hw == 4 else "<u8").tobytes())
    (tmp / "s").write_bytes(np.asarray(stream, dtype=np.uint8).tobytes())
    proc = subprocess.run([str(tool), str(tmp / "h"), str(hw), str(tmp / "s"), str(n), str(int(strict))],
                          input="".join(q + "\n" for q in queries), capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return proc.stdout.splitlines()


def _compare(tool: Path, tmp: Path, y: np.ndarray, strict: bool, seed: int, *, hw: int = 4, shift: int = 0) -> None:
    """Every value (access by position and whole-chunk decoding) and 200 searches, C against succinct.py.

    shift > 0: the header's first values moved up by ``shift`` (a u64 header holding values
    past 2³², which ef_encode does not write; the chunks are coded relative to their first value).
    """
    head, stream = ef_encode(y)
    n = len(y)
    ref = ChunkedEF("t", "SEQ", head, stream, n)
    h64 = head.astype(np.uint64)
    if shift and n:
        h64[0::2] += np.uint64(shift)
    rng = random.Random(seed)
    top = int(y[-1]) + 3 if n else 3
    searches = []
    for _ in range(200):
        s = rng.randrange(n + 1)
        e = rng.randrange(s, n + 1)
        v = rng.choice([rng.randrange(top), int(y[rng.randrange(n)]) if n else 0, int(y[s]) if s < n else top])
        searches.append((v, s, e))
    queries = [f"g {j}" for j in range(n)] + ["a"] + [f"l {v + shift} {s} {e}" for v, s, e in searches]
    out = _run(tool, tmp, h64, hw, stream, n, strict, queries)
    assert out[0] == "open OK", out[0]
    want = [str(int(v) + shift) for v in y]
    assert out[1 : 1 + n] == want  # nw_ef_get: select in the high bits
    assert out[1 + n : 1 + 2 * n] == want and out[1 + 2 * n] == "end"  # nw_ef_chunk
    for line, (v, s, e) in zip(out[2 + 2 * n :], searches, strict=True):
        j = ref.lower_bound(v, s, e)  # succinct.ChunkedEF.lower_bound: the reference search
        assert line == (f"{j} {int(y[j]) + shift}" if j < e else f"{j} -"), (v, s, e, line)


@st.composite
def sequences(draw: st.DrawFn) -> tuple[np.ndarray, bool]:
    """A non-decreasing (or strictly increasing) sequence mixing dense runs, repeats and large gaps."""
    strict = draw(st.booleans())
    gaps = draw(st.lists(st.one_of(st.integers(0, 3), st.integers(0, 300), st.integers(0, 1 << 20)), max_size=400))
    y = np.cumsum(np.asarray(gaps, dtype=np.int64) + int(strict)) if gaps else np.zeros(0, dtype=np.int64)
    return y, strict


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seq=sequences(), wide=st.booleans())
def test_every_value_and_search_equals_succinct(ef_tool: Path, tmp_path: Path, seq: tuple[np.ndarray, bool],
                                                wide: bool) -> None:
    # reference: nextword.succinct (ef_encode / ChunkedEF.at, .chunk, .lower_bound) on the same bytes;
    # u32 and u64 headers (docs/FORMAT.md §7.18: the element type is declared in the section table)
    y, strict = seq
    _compare(ef_tool, tmp_path, y, strict, seed=len(y), hw=8 if wide else 4)


def test_edge_sequences(ef_tool: Path, tmp_path: Path) -> None:
    # the chunk boundaries (N = 0, 1, 63, 64, 65, 128, 129), one value repeated (ℓ = 0, the high
    # region all ones), values near 2³² (the u32 header's limit, ℓ up to 31), a u64 header with
    # values past 2⁴⁰, and a chunk whose low parts straddle a 64-bit load (ℓ = 27 at odd offsets)
    cases: list[tuple[np.ndarray, bool, int]] = []
    for n in (0, 1, 63, 64, 65, 128, 129):
        cases.append((np.arange(n, dtype=np.int64) * 3, True, 0))
    cases.append((np.full(130, 7, dtype=np.int64), False, 0))
    cases.append((np.array([0, 1, (1 << 32) - 3, (1 << 32) - 2], dtype=np.int64), True, 0))
    cases.append((np.linspace(0, (1 << 32) - 2, 200).astype(np.int64), True, 0))
    cases.append((np.arange(150, dtype=np.int64) * 1000, True, 1 << 40))
    cases.append((np.cumsum(np.full(31, (1 << 27) + 12345, dtype=np.int64)), True, 0))
    for i, (y, strict, shift) in enumerate(cases):
        _compare(ef_tool, tmp_path, y, strict, seed=i, hw=8 if shift else 4, shift=shift)


def _one_chunk(values: list[int], end: int) -> tuple[list[int], bytes]:
    """A one-chunk sequence coded by the bullet points of docs/FORMAT.md §7.18 (Python integers, any
    64-bit values): the u64 header [F₀, 0, end, size] and the stream with its 8 zero bytes."""
    m, first = len(values), values[0]
    r = end - first
    low = (r // m).bit_length() - 1 if r >= m else 0
    size = m * low + (r >> low) + m
    bits = [0] * size
    for k, v in enumerate(values):
        d = v - first
        for b in range(low):
            bits[k * low + b] = (d >> b) & 1
        bits[m * low + (d >> low) + k] = 1
    stream = bytes(sum(bits[i + j] << j for j in range(8) if i + j < size) for i in range(0, size, 8)) + bytes(8)
    return [first, 0, end, size], stream


def test_u64_chunks_with_wide_low_parts(ef_tool: Path, tmp_path: Path) -> None:
    # low parts of 58 … 62 bits (values up to 2⁶³, only a u64 header holds them): a low part then
    # straddles the 64-bit load at most bit offsets, the one read of a ninth byte in ef.c
    rng = random.Random(3)
    for m in (1, 7, 40, 64):
        values = sorted(rng.randrange(1 << 62, 1 << 63) for _ in range(m))
        end = values[-1] + 1 + rng.randrange(1 << 62)
        head, stream = _one_chunk(values, end)
        queries = [f"g {j}" for j in range(m)] + ["a"] + [f"l {values[j]} 0 {m}" for j in range(m)] + [f"l {end} 0 {m}"]
        out = _run(ef_tool, tmp_path, np.array(head, dtype=np.uint64), 8, np.frombuffer(stream, dtype=np.uint8), m, False,
                   queries)
        assert out[0] == "open OK", out[0]
        assert out[1 : 1 + m] == out[1 + m : 1 + 2 * m] == [str(v) for v in values] and out[1 + 2 * m] == "end"
        firsts = [values.index(v) for v in values]  # lower_bound of a stored value: its first occurrence
        assert out[2 + 2 * m :] == [f"{j} {values[j]}" for j in firsts] + [f"{m} -"]


def test_hostile_sequences_are_refused_or_read_in_bounds(ef_tool: Path, tmp_path: Path) -> None:
    # mutated headers and streams (any byte, a truncated or lengthened stream, a header entry
    # changed) under the sanitizers: the open refuses every sequence succinct.ef_check_headers
    # refuses (§7.18 "Checks on load"), and a sequence both accept decodes to succinct's values
    # or is reported damaged ("E"), never read out of bounds
    rng = random.Random(5)
    base = [np.cumsum(rng.choice([1, 2, 5, 40, 3000]) * np.ones(n, dtype=np.int64)) for n in (1, 64, 100, 300)]
    base.append(np.cumsum(np.array([rng.randrange(0, 9) for _ in range(200)], dtype=np.int64)))
    refused = agreed = damaged = 0
    for trial in range(120):
        y = base[trial % len(base)]
        strict = bool(np.all(np.diff(y) > 0))
        head, stream = ef_encode(y)
        head, stream = head.astype(np.int64), stream.copy()
        how = trial % 4
        if how == 0:  # bytes of the stream
            for _ in range(rng.randint(1, 3)):
                stream[rng.randrange(len(stream))] = rng.randrange(256)
        elif how == 1:  # one header entry
            i = rng.randrange(len(head))
            head[i] = max(0, int(head[i]) + rng.choice([-65, -1, 1, 2, 64, 1000]))
        elif how == 2:  # a shorter or longer stream
            stream = stream[: rng.randrange(len(stream))] if rng.random() < 0.5 else np.append(stream, np.zeros(8, np.uint8))
        else:  # a bit flipped in the first chunk's high region, checksums being no part of a sequence
            stream[rng.randrange(min(len(stream), 40))] ^= 1 << rng.randrange(8)
        n = len(y)
        try:
            ef_check_headers("t", "SEQ", head.astype(np.uint64), stream, n, strict=strict)
            py_ok = True
        except ModelFormatError:
            py_ok = False
        out = _run(ef_tool, tmp_path, head.astype(np.uint64), 4 if int(head.max()) < 1 << 32 else 8, stream, n, strict,
                   [f"g {j}" for j in range(n)] + ["a"])
        if not out[0].startswith("open OK"):
            refused += 1
            continue
        assert py_ok, (trial, out[0])  # C opened what Python refuses
        try:
            vals = ChunkedEF("t", "SEQ", head.astype(np.uint64), stream, n).all()
        except ModelFormatError:
            vals = None
        body, rest = out[1 : 1 + n], out[1 + n :]
        if vals is None or "E" in body or rest[-1] != "end":
            damaged += 1  # reported as damaged by one reader (C is the stricter: every value ≤ F_{c+1})
        if vals is not None and "E" not in body:
            assert body == [str(int(v)) for v in vals]  # access by position decodes what succinct decodes
        if vals is not None and rest[-1] == "end":
            assert rest[:-1] == [str(int(v)) for v in vals]
            agreed += 1
    assert refused > 20 and agreed > 10 and damaged > 5, (refused, agreed, damaged)


def test_chunk_size_is_the_documented_one() -> None:
    # docs/FORMAT.md §7.18 fixes 64 values per chunk for version 1; native/src/ef.h says the same
    assert CHUNK == 64
    header = (Path(__file__).resolve().parent.parent / "native" / "src" / "ef.h").read_text(encoding="utf-8")
    assert "#define NW_EF_CHUNK 64" in header and "#define NW_EF_PAD 8" in header
