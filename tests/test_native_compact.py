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
import struct
import subprocess
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword.errors import ModelFormatError
from nextword.mix import load_mix, write_mix
from nextword.prune import prune_model
from nextword.store import HEADER, atomic_write, read_model
from nextword.succinct import CHUNK, ChunkedEF, ef_check_headers, ef_encode

from test_native import (  # noqa: F401 - build_dir, native, corpus and fuzz_driver are fixtures used here
    Native,
    _make,
    _queries,
    _recrc,
    _same,
    _sections,
    build_dir,
    check_mutants_under_sanitizers,
    corpus,
    fuzz_driver,
    native,
)
from test_native_quant import NW_E_DAMAGED, NW_E_FORMAT, NW_E_UNSUPPORTED, NW_E_VERSION, _both_refuse, _meta_edit, _retable


@pytest.fixture(scope="module")
def ef_tool(build_dir: Path) -> Path:
    _make(build_dir, "ef-tool", "ZLIB=0", timeout=600)  # the same sanitizer objects as `make fuzz ZLIB=0`
    return build_dir / "nwef"


def _run(tool: Path, tmp: Path, head: np.ndarray, hw: int, stream: np.ndarray, n: int, strict: bool,
         queries: list[str], *, chunks: bool = True) -> list[str]:
    """nwef on one sequence (header written with ``hw`` bytes per entry; ``chunks``: every chunk header
    checked on open, else only by the readers); its output lines."""
    (tmp / "h").write_bytes(np.asarray(head, dtype="<u4" if hw == 4 else "<u8").tobytes())
    (tmp / "s").write_bytes(np.asarray(stream, dtype=np.uint8).tobytes())
    proc = subprocess.run([str(tool), str(tmp / "h"), str(hw), str(tmp / "s"), str(n), str(int(strict)), str(int(chunks))],
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
    for m in (2, 7, 40, 64):
        values = sorted(rng.randrange(1 << 62, 1 << 63) for _ in range(m))
        end = values[-1] + 1  # the sentinel: the last value + 1 (checked when the last chunk is decoded)
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
    # or is reported damaged ("E"); reads and searches never go out of bounds
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
        chunks = trial % 3 != 0  # a third opened as the n-gram-sized sequences are: chunk headers left to the readers
        try:
            ef_check_headers("t", "SEQ", head.astype(np.uint64), stream, n, strict=strict, chunks=chunks)
            py_ok = True
        except ModelFormatError:
            py_ok = False
        top = int(y[-1]) + 2
        searches = [f"l {rng.randrange(top)} {s} {rng.randrange(s, n + 1)}" for s in (rng.randrange(n + 1) for _ in range(30))]
        out = _run(ef_tool, tmp_path, head.astype(np.uint64), 4 if int(head.max()) < 1 << 32 else 8, stream, n, strict,
                   [f"g {j}" for j in range(n)] + ["a"] + searches, chunks=chunks)
        if not out[0].startswith("open OK"):
            refused += 1
            continue
        assert py_ok, (trial, out[0])  # C opened what Python refuses
        try:
            vals = ChunkedEF("t", "SEQ", head.astype(np.uint64), stream, n).all()
        except ModelFormatError:
            vals = None
        body, rest = out[1 : 1 + n], out[1 + n : len(out) - len(searches)]  # the searches: only no crash
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


# -- whole 1.6 files: the same answers as nextword.Model ---------------------------------------------

KINDS = {
    "jm2": dict(),
    "kn2": dict(smoothing="kn", skyband_min=8),
    "jm3": dict(order=3),
    "kn3": dict(smoothing="kn", order=3, skyband_min=8, skyband_k=4),
}
FILES = ["jm2", "jm2-q5", "kn2", "kn2-q5", "kn3", "kn3-q5", "jm3-q5", "kn3-pruned", "jm2-pruned"]


@pytest.fixture(scope="module")
def cmodels(corpus: tuple[list[str], list[str]], tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """1.6 files of every kind, exact and 5-bit; a pruned 1.6 KN trigram and JM bigram (dropped mass:
    Model answers the JM bigram with its general scorer); and the 1.4/1.5 file of the same model
    beside each KN trigram (name + "-plain")."""
    train, _ = corpus
    d = tmp_path_factory.mktemp("native-compact-models")
    out: dict[str, Path] = {}
    for name in [f for f in FILES if not f.endswith("-pruned")]:
        kind, _, q = name.partition("-q")
        out[name] = d / f"{name}.nwm"
        nextword.train_texts(train, out[name], min_count=2, quantize=int(q) if q else None, compact=True, **KINDS[kind])  # type: ignore[arg-type]
    for name in ("kn3", "kn3-q5"):
        out[f"{name}-plain"] = d / f"{name}-plain.nwm"
        q = 5 if name.endswith("q5") else None
        nextword.train_texts(train, out[f"{name}-plain"], min_count=2, quantize=q, **KINDS["kn3"])  # type: ignore[arg-type]
    for name, keep in (("kn3", 0.6), ("jm2", 0.9)):  # a file read back keeps its words: a budget above the vocabulary
        chunks, _ = prune_model(nextword.load(out[name]), int(out[name].stat().st_size * keep))
        out[f"{name}-pruned"] = d / f"{name}-pruned.nwm"
        atomic_write(out[f"{name}-pruned"], chunks)
    return out


def _open(native: Native, path: Path) -> tuple[Any, Any]:
    code, msg, m = native.open(path)
    assert code == 0, msg
    return m, native.session(m)


def _close(native: Native, m: Any, s: Any) -> None:
    native.lib.nw_session_free(s)
    native.lib.nw_close(m)


def test_the_files_are_what_the_comparison_needs(cmodels: dict[str, Path]) -> None:
    # format 1.6 with META successors ef/1 (docs/FORMAT.md §7.18), the codec asked for; the pruned
    # file has dropped mass; the plain files are 1.4/1.5 (the same model, other layout)
    for name, path in cmodels.items():
        arrays = read_model(path)
        if name.endswith("-plain"):
            assert arrays.version == ((1, 5) if "q5" in name else (1, 4)), name
            continue
        assert arrays.version == (1, 6), name
        assert arrays.meta["successors"] == {"name": "ef", "version": 1}
        # compact files write the quant codec's version 2 (a ones bitmap, codes for the other values)
        assert arrays.meta["codec"]["name"] == ("quant" if "q5" in name else "exact"), name
        assert arrays.meta["codec"]["version"] == (2 if "q5" in name else 1), name
        tags = set(_sections(path.read_bytes()))
        base = {b"RWEH", b"RWEB", b"SEFH", b"SEFB", b"UNEH", b"UNEB", b"HSEH", b"HSEB", b"HDIH", b"HDIB", b"HDVH", b"HDVB"}
        assert base <= tags and not tags & {b"SUCC", b"ROWS", b"IDTK", b"APOS", b"TSUC", b"UNIG", b"HIST", b"HDRI", b"HN13"}
        assert ({b"TPTH", b"TPTB", b"TEFH", b"TEFB", b"TDIH", b"TDIB", b"TDVH", b"TDVB"} <= tags) == ("3" in name), name
        assert ({b"N1EH", b"N1EB", b"N2EH", b"N2EB"} <= tags) == name.startswith("kn"), name
    assert len(read_model(cmodels["kn3-pruned"]).arrays["HDRI"]) > 0 and len(read_model(cmodels["jm2-pruned"]).arrays["HDRI"]) > 0
    assert read_model(cmodels["kn3-pruned"]).meta["dropped_contexts"][1] > 0  # trigram contexts with dropped mass (TDI/TDV)


@pytest.mark.parametrize("name", FILES)
def test_compact_suggest_equals_python_on_held_out_queries(native: Native, cmodels: dict[str, Path],
                                                           corpus: tuple[list[str], list[str]], name: str) -> None:
    # reference: nextword.Model.suggest on the same 1.6 file; 1,200 held-out queries per file
    # (next word, 1-3 letter prefixes, casing, sentence starts, unseen contexts), bit for bit
    model = nextword.load(cmodels[name])
    m, s = _open(native, cmodels[name])
    try:
        bad, answered, bit_equal, probs = [], 0, 0, 0
        for typed, k in _queries(corpus[1], 1200, seed=sum(map(ord, name))):
            code, ours = native.suggest(s, typed, k)
            assert code == 0, (typed, k, code)
            theirs = model.suggest(typed, k)
            answered += bool(theirs)
            if not _same(ours, theirs):
                bad.append((typed, k, ours, theirs))
            bit_equal += sum(p == t.prob for (_, p), t in zip(ours, theirs))
            probs += len(theirs)
        assert not bad, bad[:5]
        assert answered > 900
        assert bit_equal == probs
    finally:
        _close(native, m, s)


@pytest.mark.parametrize("name", ["jm2-q5", "kn2", "kn3", "kn3-q5", "kn3-pruned", "jm2-pruned"])
def test_compact_prob_equals_prob_after(native: Native, cmodels: dict[str, Path], corpus: tuple[list[str], list[str]],
                                        name: str) -> None:
    # reference: nextword.Model.prob_after (every history form: start, <unk>, one or two words)
    model = nextword.load(cmodels[name])
    m, s = _open(native, cmodels[name])
    rng = random.Random(13)
    words = [w for ln in corpus[1][:300] for w in ln.split()][:600] + ["</s>", "<unk>", "zzqx", "The", "THE"]
    try:
        for _ in range(500):
            hist: list[str | None] = rng.choice([[], [None], ["<unk>"], [rng.choice(words)], [rng.choice(words), rng.choice(words)],
                                                 ["<s>", rng.choice(words)], [rng.choice(words), "<s>", rng.choice(words)]])
            hist = [h for h in hist if h != "</s>"]
            w = rng.choice(words)
            code, p = native.prob(s, w, hist)
            assert code == 0
            assert p == model.prob_after(w, hist), (w, hist)
    finally:
        _close(native, m, s)


@pytest.mark.parametrize("name", ["kn3", "kn3-q5"])
def test_a_compact_file_answers_as_its_plain_layout(native: Native, cmodels: dict[str, Path],
                                                    corpus: tuple[list[str], list[str]], name: str) -> None:
    # the 1.6 file and the 1.4/1.5 file of the same training run are one model (§7.18: "stores the
    # same model"): the C runtime gives the same words and the same floats from both layouts
    m1, s1 = _open(native, cmodels[name])
    m2, s2 = _open(native, cmodels[f"{name}-plain"])
    try:
        for typed, k in _queries(corpus[1], 600, seed=2):
            assert native.suggest(s1, typed, k) == native.suggest(s2, typed, k), typed
    finally:
        _close(native, m1, s1)
        _close(native, m2, s2)


def test_a_mixture_with_a_compact_part_equals_python(native: Native, cmodels: dict[str, Path],
                                                     corpus: tuple[list[str], list[str]], tmp_path: Path) -> None:
    # reference: nextword.mix.load_mix(...).suggest (docs/FORMAT.md §13) on a mixture of a 1.6 KN
    # trigram and a 1.5 KN trigram, bit for bit
    path = tmp_path / "mix.nwx"
    write_mix(path, [cmodels["kn3-q5"], cmodels["kn3-plain"]], [0.35, 0.65])
    mix = load_mix(path)
    m, s = _open(native, path)
    try:
        for typed, k in _queries(corpus[1], 400, seed=8):
            code, ours = native.suggest(s, typed, k)
            theirs = mix.suggest(typed, k)
            assert code == 0 and [w for w, _ in ours] == [t.word for t in theirs], typed
            assert [p for _, p in ours] == [t.prob for t in theirs], typed
    finally:
        _close(native, m, s)


def test_compact_queries_allocate_nothing_and_threads_share_a_model(build_dir: Path, cmodels: dict[str, Path],
                                                                    corpus: tuple[list[str], list[str]], tmp_path: Path) -> None:
    # native/tools/nwcheck.c: no heap allocation around 500 queries of a 1.6 file (the Elias-Fano
    # reads use the stack), and 4 threads on one model give the single-thread answers
    _make(build_dir, "check-tools")
    queries = tmp_path / "q.txt"
    queries.write_text("".join(t.replace("\n", " ") + "\n" for t, _ in _queries(corpus[1], 500, seed=4)), encoding="utf-8")
    tool = str(build_dir / "nwcheck")
    for name in ("kn3-q5", "jm2"):
        proc = subprocess.run([tool, "--alloc", str(cmodels[name]), str(queries)], capture_output=True, text=True, timeout=120)
        assert proc.returncode == 0 and '"allocations": 0' in proc.stdout, proc.stdout + proc.stderr
    proc = subprocess.run([tool, "--threads", "4", str(cmodels["kn3-q5"]), str(queries)], capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 0 and '"threads_differing": 0' in proc.stdout, proc.stdout + proc.stderr


# -- refusals: META successors, the section set, every load check of §7.18 ---------------------------


def test_successors_field_is_checked_by_name(native: Native, cmodels: dict[str, Path], tmp_path: Path) -> None:
    # §7.18: 'successors' {"name": "ef", "version": 1} is required in 1.6 and refused elsewhere;
    # another name or version is refused naming it (C: NW_E_UNSUPPORTED)
    data = cmodels["kn3-q5"].read_bytes()
    _both_refuse(native, tmp_path, _meta_edit(data, b"\xa2ef", b"\xa2pf"), {NW_E_UNSUPPORTED}, "'pf'")
    _both_refuse(native, tmp_path, _meta_edit(data, b"\xa2ef\xa7version\x01", b"\xa2ef\xa7version\x02"), {NW_E_UNSUPPORTED},
                 "version 2")
    _both_refuse(native, tmp_path, _meta_edit(data, b"\xaasuccessors", b"\xaasuccessorz"), {NW_E_FORMAT}, "successors")
    for minor in (4, 5):  # a 1.6 file labelled 1.4/1.5: the field (and the sections) do not belong there
        buf = bytearray(data)
        struct.pack_into("<H", buf, 10, minor)
        _recrc(buf)
        _both_refuse(native, tmp_path, bytes(buf), {NW_E_FORMAT, NW_E_VERSION}, "")


def _rename(buf: bytearray, old: bytes, new: bytes) -> None:
    n_sec = HEADER.unpack_from(buf, 0)[3]
    for i in range(n_sec):
        at = HEADER.size + i * 32
        if bytes(buf[at : at + 4]) == old:
            buf[at : at + 4] = new
            return
    raise AssertionError(old)


@pytest.mark.parametrize("seq", ["RWE", "UNE", "HSE", "N1E", "SEF", "TPT", "TEF"])
def test_every_sequence_load_check_refuses_what_python_refuses(native: Native, cmodels: dict[str, Path], tmp_path: Path,
                                                               seq: str) -> None:
    # §7.18 "Checks on load", each on a crafted file with every checksum fixed: the stream one byte
    # short, a bit set in the padding, a chunk offset moved, the chunks' first values decreasing,
    # the header one entry short; and a replaced section (SUCC, TSUC) in place of a sequence's header
    src = cmodels["kn3"]
    data = src.read_bytes()
    secs = _sections(data)
    h_off, h_len = secs[f"{seq}H".encode()]
    b_off, b_len = secs[f"{seq}B".encode()]
    width = 4  # the writer's u32 headers (every value fits)
    head = np.frombuffer(data[h_off : h_off + h_len], dtype="<u4")
    assert len(head) >= 6  # three chunks or more

    def crafted(edit: Any) -> bytes:
        buf = bytearray(data)
        edit(buf)
        _recrc(buf)
        return bytes(buf)

    def short_stream(b: bytearray) -> None:
        b[b_off + b_len - 1] = 0
        _retable(b, f"{seq}B".encode(), b_off, b_len - 1)

    def padding(b: bytearray) -> None:
        b[b_off + b_len - 1] = 0x80

    def offset(b: bytearray) -> None:  # chunk 0's end offset (O₁, or the stream length) one bit later
        struct.pack_into("<I", b, h_off + 3 * width, int(head[3]) + 1)

    def first(b: bytearray) -> None:  # chunk 1's first value above chunk 2's (the first values must not decrease)
        struct.pack_into("<I", b, h_off + 2 * width, int(head[4]) + 1)

    def short_head(b: bytearray) -> None:
        b[h_off + h_len - 8 : h_off + h_len] = bytes(8)
        _retable(b, f"{seq}H".encode(), h_off, h_len - 8)

    def replaced(b: bytearray) -> None:
        _rename(b, f"{seq}H".encode(), {"TEF": b"TSUC", "UNE": b"UNIG", "HSE": b"HIST", "N1E": b"HN13"}.get(seq, b"SUCC"))

    for edit, says in ((short_stream, "stream has"), (padding, "stream"), (short_head, "header entries"), (replaced, "")):
        _both_refuse(native, tmp_path, crafted(edit), {NW_E_FORMAT}, says)
    # a chunk's header: checked on load for the vocabulary-sized sequences; for the n-gram-sized ones
    # both readers check it when a query decodes the chunk (Python also with verify=True): the file
    # opens, and a query that reads the chunk is refused (NW_E_DAMAGED), none answers out of range
    for edit in (offset, first):
        if seq in ("SEF", "TPT", "TEF"):
            path = tmp_path / "bad.nwm"
            path.write_bytes(crafted(edit))
            with pytest.raises(nextword.ModelFormatError):
                nextword.load(path, verify=True)
            code, msg, m = native.open(path)
            assert code == 0, msg
            s = native.session(m)
            results = [native.suggest(s, typed, 5) for typed in ("", "the ", "of the ", "in a ", "a", "t", "is ")]
            _close(native, m, s)
            assert all(c in (0, NW_E_DAMAGED) and all(0.0 <= p <= 1.0 for _, p in r) for c, r in results)
        else:
            _both_refuse(native, tmp_path, crafted(edit), {NW_E_FORMAT}, "")


def test_a_damaged_stream_is_caught_by_the_query_that_reads_it(native: Native, cmodels: dict[str, Path],
                                                               corpus: tuple[list[str], list[str]], tmp_path: Path) -> None:
    # SEFB's checksum is checked only with verify=True (a bigram-sized section, §8 item 6): a stream
    # whose high bits lose their set bits (checksums fixed, headers intact) opens; a query reading
    # those chunks answers NW_E_DAMAGED or a valid answer, never a probability outside [0, 1]
    src = cmodels["kn2"]
    buf = bytearray(src.read_bytes())
    off, length = _sections(bytes(buf))[b"SEFB"]
    buf[off : off + length // 2] = bytes(length // 2)
    _recrc(buf)
    path = tmp_path / "dark.nwm"
    path.write_bytes(bytes(buf))
    m, s = _open(native, path)
    damaged = 0
    try:
        for typed, k in _queries(corpus[1], 300, seed=6):
            code, ours = native.suggest(s, typed, k)
            assert code in (0, NW_E_DAMAGED), code
            damaged += code == NW_E_DAMAGED
            assert all(0.0 <= p <= 1.0 + 1e-9 for _, p in ours)
    finally:
        _close(native, m, s)
    assert damaged > 20
    with pytest.raises(nextword.ModelFormatError):
        nextword.load(path, verify=True)


# -- hostile 1.6 files under the sanitizers ---------------------------------------------------------


@pytest.fixture(scope="module")
def compact_seeds(tmp_path_factory: pytest.TempPathFactory) -> dict[str, bytes]:
    """Small valid 1.6 files of every kind (the messages of tests/test_load_bounds.py), to mutate."""
    import test_load_bounds  # the same seed messages as the Python reader's hostile tests

    d = tmp_path_factory.mktemp("compact-seeds")
    seeds: dict[str, bytes] = {}
    for q in (None, 2):
        for name, kw in (("jm2", {}), ("kn2", dict(smoothing="kn")), ("jm3", dict(order=3)), ("kn3", dict(smoothing="kn", order=3))):
            path = d / f"{name}-{q}.nwm"
            nextword.train_texts(test_load_bounds.MSGS, path, min_count=1, skyband_min=1, skyband_k=2, quantize=q, compact=True,
                                 **kw)  # type: ignore[arg-type]
            seeds[f"{name}-{q}"] = path.read_bytes()
    chunks, _ = prune_model(nextword.load(d / "kn3-None.nwm"), len(seeds["kn3-None"]) - 200)
    atomic_write(d / "kn3-pruned.nwm", chunks)
    seeds["kn3-pruned"] = (d / "kn3-pruned.nwm").read_bytes()
    return seeds


def test_hostile_compact_files_give_error_codes_never_a_crash(fuzz_driver: Path, compact_seeds: dict[str, bytes],
                                                              tmp_path: Path) -> None:
    # every mutant of a 1.6 file in the sanitizer build (tests/test_native.py's check: no crash, the
    # seeds open, whatever the Python reader refuses on load the C open refuses too)
    check_mutants_under_sanitizers(fuzz_driver, compact_seeds, 1200, 4, tmp_path)


def test_fuzz_random_mutations_of_compact_files_under_sanitizers(fuzz_driver: Path, compact_seeds: dict[str, bytes],
                                                                 tmp_path: Path) -> None:
    # the driver's own mutations (random bytes, and crafted files with fixed checksums) of every 1.6 seed
    seeds = []
    for name, data in compact_seeds.items():
        (tmp_path / f"{name}.nwm").write_bytes(data)
        seeds.append(str(tmp_path / f"{name}.nwm"))
    proc = subprocess.run([str(fuzz_driver), "--mutate", "300", "--seed", "12", *seeds], capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "iterations" in proc.stdout
