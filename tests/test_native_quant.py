"""The native C runtime reads format 1.5 (the quantised ``quant`` codec) exactly like the Python library.

The reference for every answer is ``nextword.Model`` on the same file (docs/FORMAT.md §7.17
describes the codec byte by byte, §10.8 works one file by hand). The models are trained on
``pydoc_data.topics`` split by the project's held-out rule, with the helpers, the ctypes
binding and the hostile-file machinery of tests/test_native.py (imported, not copied);
queries come from the held-out part. Skipped like tests/test_native.py when the library
cannot be built.
"""

from __future__ import annotations

import random
import struct
import subprocess
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import nextword
from nextword.prune import prune_model
from nextword.store import HEADER, atomic_write, read_model

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

BITS = (2, 5, 8)
KINDS = {
    "jm2": dict(),
    "kn2": dict(smoothing="kn", skyband_min=8),
    "jm3": dict(order=3),
    "kn3": dict(smoothing="kn", order=3, skyband_min=8, skyband_k=4),
}
FILES = [f"{kind}-q{bits}" for bits in BITS for kind in [*KINDS, "jm2-pruned"]]


@pytest.fixture(scope="module")
def qmodels(corpus: tuple[list[str], list[str]], tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Every kind at 2, 5 and 8 bits, and a pruned quantised JM bigram (dropped mass: the general scorer)."""
    train, _ = corpus
    d = tmp_path_factory.mktemp("native-quant-models")
    out: dict[str, Path] = {}
    for bits in BITS:
        for kind, kw in KINDS.items():
            out[f"{kind}-q{bits}"] = d / f"{kind}-q{bits}.nwm"
            nextword.train_texts(train, out[f"{kind}-q{bits}"], min_count=2, quantize=bits, **kw)  # type: ignore[arg-type]
        src = out[f"jm2-q{bits}"]
        # a file read back keeps its words: a budget between the vocabulary alone and the whole file
        chunks, _ = prune_model(nextword.load(src), int(src.stat().st_size * 0.9))
        out[f"jm2-pruned-q{bits}"] = d / f"jm2-pruned-q{bits}.nwm"
        atomic_write(out[f"jm2-pruned-q{bits}"], chunks)
    return out


def _open(native: Native, path: Path) -> tuple[Any, Any]:
    code, msg, m = native.open(path)
    assert code == 0, msg
    return m, native.session(m)


def _close(native: Native, m: Any, s: Any) -> None:
    native.lib.nw_session_free(s)
    native.lib.nw_close(m)


def test_the_files_are_what_the_comparison_needs(qmodels: dict[str, Path]) -> None:
    # each file is format 1.5 with the codec width asked for; the pruned JM bigrams carry dropped
    # mass (HDRI not empty: Model answers them with the general scorer), the others none
    for name, path in qmodels.items():
        arrays = read_model(path)
        assert arrays.version == (1, 5), name
        assert arrays.meta["codec"] == {"name": "quant", "version": 1, "bits": int(name.rsplit("q", 1)[1])}
        assert (len(arrays.arrays["HDRI"]) > 0) == ("pruned" in name), name
    # the coarse widths really lose information (so the comparison is not the exact codec's)
    assert len(read_model(qmodels["kn3-q2"]).arrays["TBGI"]) == 4


@pytest.mark.parametrize("name", FILES)
def test_quantised_suggest_equals_python_on_held_out_queries(native: Native, qmodels: dict[str, Path],
                                                             corpus: tuple[list[str], list[str]], name: str) -> None:
    # reference: nextword.Model.suggest on the same 1.5 file; 2,000 held-out queries per file
    # (next word, 1-3 letter prefixes, casing, sentence starts, unseen contexts), 15 files
    model = nextword.load(qmodels[name])
    m, s = _open(native, qmodels[name])
    try:
        bad, answered, bit_equal, probs = [], 0, 0, 0
        for typed, k in _queries(corpus[1], 2000, seed=sum(map(ord, name))):
            code, ours = native.suggest(s, typed, k)
            assert code == 0, (typed, k, code)
            theirs = model.suggest(typed, k)
            answered += bool(theirs)
            if not _same(ours, theirs):
                bad.append((typed, k, ours, theirs))
            bit_equal += sum(p == t.prob for (_, p), t in zip(ours, theirs))
            probs += len(theirs)
        assert not bad, bad[:5]
        assert answered > 1500
        assert bit_equal == probs  # not only within 1e-12: the same floating-point operations
    finally:
        _close(native, m, s)


@pytest.mark.parametrize("name", FILES)
def test_quantised_prob_equals_prob_after(native: Native, qmodels: dict[str, Path], corpus: tuple[list[str], list[str]],
                                          name: str) -> None:
    # reference: nextword.Model.prob_after (every history form: start, <unk>, one or two words)
    model = nextword.load(qmodels[name])
    m, s = _open(native, qmodels[name])
    rng = random.Random(11)
    words = [w for ln in corpus[1][:300] for w in ln.split()][:600] + ["</s>", "<unk>", "zzqx", "The", "THE"]
    try:
        for _ in range(600):
            hist: list[str | None] = rng.choice([[], [None], ["<unk>"], [rng.choice(words)], [rng.choice(words), rng.choice(words)],
                                                 ["<s>", rng.choice(words)], [rng.choice(words), "<s>", rng.choice(words)]])
            hist = [h for h in hist if h != "</s>"]
            w = rng.choice(words)
            code, p = native.prob(s, w, hist)
            assert code == 0
            assert p == model.prob_after(w, hist), (w, hist)
    finally:
        _close(native, m, s)


def test_worked_quantised_example_of_the_format_document(native: Native, tmp_path: Path) -> None:
    # docs/FORMAT.md §10.8 (worked by hand there): a 2-bit JM bigram; P(am | i) = 0.9·13/16 + 0.1·13/79,
    # P(i | <s>) = 0.9·13/17 + 0.1·16/79 (the pair stored as 13, its row total 17 of stored values)
    path = tmp_path / "tiny-q2.nwm"
    texts = ["I am Sam."] * 9 + ["Sam I am."] * 4 + ["I do not like green eggs and ham."] * 3
    nextword.train_texts(texts, path, min_count=1, quantize=2)
    a = read_model(path).arrays
    assert a["CNTS"].tolist() == [99, 9, 0, 28] and a["BIGI"].tolist() == [3, 4, 9, 13]  # §10.8's sections
    m, s = _open(native, path)
    try:
        code, got = native.suggest(s, "I ", 2)
        assert code == 0 and got[0][0] == "am"
        assert got[0][1] == pytest.approx(0.9 * 13 / 16 + 0.1 * 13 / 79, rel=1e-15)
        code, got = native.suggest(s, "", 1)
        assert code == 0 and got[0][0] == "I"
        assert got[0][1] == pytest.approx(0.9 * 13 / 17 + 0.1 * 16 / 79, rel=1e-15)
        code, p = native.prob(s, "am", ["i"])
        assert code == 0 and p == pytest.approx(0.7477056962, rel=1e-10)
        # every history sums to 1 over the vocabulary, </s> and <unk> (§10.8: row <s> gives 0.9 to its two successors)
        vocab = [w for w, _ in nextword.load(path).words()] + ["</s>", "<unk>"]
        for hist in ([], ["i"], ["am"], ["sam"], ["ham"]):
            assert sum(native.prob(s, w, hist)[1] for w in vocab) == pytest.approx(1.0, abs=1e-12), hist
    finally:
        _close(native, m, s)


@pytest.mark.parametrize("name", ["jm2-pruned-q5", "kn3-q5"])
def test_quantised_queries_allocate_nothing_and_threads_share_a_model(build_dir: Path, qmodels: dict[str, Path],
                                                                      corpus: tuple[list[str], list[str]], tmp_path: Path,
                                                                      name: str) -> None:
    # native/tools/nwcheck.c (as tests/test_native.py uses it): no heap allocation around 500
    # queries of a 1.5 file, and 4 threads on one model give the single-thread answers
    _make(build_dir, "check-tools")
    queries = tmp_path / "q.txt"
    queries.write_text("".join(t.replace("\n", " ") + "\n" for t, _ in _queries(corpus[1], 500, seed=4)), encoding="utf-8")
    tool = str(build_dir / "nwcheck")
    proc = subprocess.run([tool, "--alloc", str(qmodels[name]), str(queries)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert '"allocations": 0' in proc.stdout
    proc = subprocess.run([tool, "--threads", "4", str(qmodels[name]), str(queries)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert '"threads_differing": 0' in proc.stdout


# -- refusals: the codec fields and every load check of §7.17 -----------------------------------


def _meta_edit(data: bytes, old: bytes, new: bytes) -> bytes:
    off, length = _sections(data)[b"META"]
    meta = data[off : off + length]
    assert meta.count(old) == 1 and len(old) == len(new)
    buf = bytearray(data)
    buf[off : off + length] = meta.replace(old, new)
    _recrc(buf)
    return bytes(buf)


def _both_refuse(native: Native, tmp_path: Path, data: bytes, codes: set[int], says: str) -> None:
    """The Python reader refuses the file (ModelFormatError), and the C open too, with one of ``codes`` and ``says``."""
    path = tmp_path / "bad.nwm"
    path.write_bytes(data)
    with pytest.raises(nextword.ModelFormatError):
        nextword.load(path)
    code, msg, _ = native.open(path)
    assert code in codes and says in msg, (code, msg)


NW_E_FORMAT, NW_E_VERSION, NW_E_UNSUPPORTED, NW_E_DAMAGED = 3, 4, 5, 6


def test_codec_fields_are_checked_by_name(native: Native, qmodels: dict[str, Path], tmp_path: Path) -> None:
    # docs/FORMAT.md §7.17: bits an int in 2 … 8; 1.4 names 'exact', 1.5 'quant'; refused naming the value
    data = qmodels["kn3-q5"].read_bytes()
    for new, says in ((b"\xa4bits\x01", "bits 1"), (b"\xa4bits\x09", "bits 9"), (b"\xa4bits\xc3", "bits"),
                      (b"\xa4bitz\x05", "bits")):
        _both_refuse(native, tmp_path, _meta_edit(data, b"\xa4bits\x05", new), {NW_E_UNSUPPORTED}, says)
    _both_refuse(native, tmp_path, _meta_edit(data, b"\xa5quant", b"\xa5exact"), {NW_E_VERSION}, "codec 'exact'")
    buf = bytearray(data)
    struct.pack_into("<H", buf, 10, 4)  # a quantised file labelled 1.4
    _recrc(buf)
    _both_refuse(native, tmp_path, bytes(buf), {NW_E_VERSION}, "codec 'quant'")
    # an exact JM bigram (format 1.0) relabelled 1.5 has no codec field: refused, never read as exact
    exact = tmp_path / "exact.nwm"
    nextword.train_texts(["I am Sam.", "Sam I am."], exact, min_count=1)
    buf = bytearray(exact.read_bytes())
    struct.pack_into("<H", buf, 10, 5)
    _recrc(buf)
    _both_refuse(native, tmp_path, bytes(buf), {NW_E_FORMAT}, "codec")


def _u32(buf: bytearray, tag: bytes, i: int, value: int) -> None:
    off, _ = _sections(bytes(buf))[tag]
    struct.pack_into("<I", buf, off + 4 * i, value)


def _retable(buf: bytearray, tag: bytes, off: int, length: int) -> None:
    """Give section ``tag`` a new offset and length in the table (the caller keeps the layout valid)."""
    n_sec = HEADER.unpack_from(buf, 0)[3]
    for i in range(n_sec):
        at = HEADER.size + i * 32
        if bytes(buf[at : at + 4]) == tag:
            struct.pack_into("<QQ", buf, at + 8, off, length)
            return
    raise AssertionError(tag)


@pytest.mark.parametrize("level", ["bigram", "trigram"])
def test_every_quant_load_check_refuses_what_python_refuses(native: Native, qmodels: dict[str, Path], tmp_path: Path,
                                                            level: str) -> None:
    # store/codecs.QuantCodec.check (docs/FORMAT.md §7.17 "Checks on every load"): the codebook's
    # order and values, its length, the third section empty, the unused bits of the last byte,
    # the stream's length; each crafted file (checksums fixed) is refused by both readers
    codes_tag, cb_tag, rest_tag = (b"CNTS", b"BIGI", b"BIGC") if level == "bigram" else (b"TVAL", b"TBGI", b"TBGC")

    def fits(name: str) -> bool:  # the layout edits below need an even codebook of 4 or more, and unused bits at the end
        ra = read_model(qmodels[name])
        n_values = int(ra.meta["bigrams" if level == "bigram" else "trigrams"])
        n_cb = len(ra.arrays[cb_tag.decode()])
        return n_cb >= 4 and n_cb % 2 == 0 and n_values * ra.meta["codec"]["bits"] % 8 != 0

    names = [f"{kind}-q{bits}" for bits in (5, 2) for kind in ("kn3", "jm3")] + ([] if level == "trigram" else ["kn2-q5", "jm2-q5"])
    src = qmodels[next(name for name in names if fits(name))]
    data = src.read_bytes()
    cb = read_model(src).arrays[cb_tag.decode()]
    secs = _sections(data)

    def crafted(edit: Any) -> bytes:
        buf = bytearray(data)
        edit(buf)
        _recrc(buf)
        return bytes(buf)

    # not strictly increasing; a zero value
    _both_refuse(native, tmp_path, crafted(lambda b: _u32(b, cb_tag, 1, int(cb[0]))), {NW_E_FORMAT}, "codebook")
    _both_refuse(native, tmp_path, crafted(lambda b: _u32(b, cb_tag, 0, 0)), {NW_E_FORMAT}, "codebook")
    cb_off, cb_len = secs[cb_tag]

    def shorter_cb_longer_rest(b: bytearray) -> None:  # the codebook 2 entries shorter, the third section 8 bytes
        _retable(b, cb_tag, cb_off, cb_len - 8)
        _retable(b, rest_tag, cb_off + cb_len - 8, 8)

    _both_refuse(native, tmp_path, crafted(shorter_cb_longer_rest), {NW_E_FORMAT}, "must be empty")

    def empty_codebook(b: bytearray) -> None:  # no codebook at all for a level that has values
        b[cb_off : cb_off + cb_len] = bytes(cb_len)
        _retable(b, cb_tag, cb_off, 0)

    _both_refuse(native, tmp_path, crafted(empty_codebook), {NW_E_FORMAT}, "codebook entries")
    # the unused high bits of the last byte
    c_off, c_len = secs[codes_tag]

    def padding(b: bytearray) -> None:
        b[c_off + c_len - 1] |= 0x80

    _both_refuse(native, tmp_path, crafted(padding), {NW_E_FORMAT}, "bits after the last code")
    # the stream one byte short (the last byte's space left as zero padding)
    def short_stream(b: bytearray) -> None:
        b[c_off + c_len - 1] = 0
        _retable(b, codes_tag, c_off, c_len - 1)

    _both_refuse(native, tmp_path, crafted(short_stream), {NW_E_FORMAT}, "bytes, expected")


def test_a_code_past_the_codebook_is_caught_where_python_catches_it(native: Native, qmodels: dict[str, Path],
                                                                    tmp_path: Path) -> None:
    # docs/FORMAT.md §7.17: a code ≥ the codebook's length is found by verify=True or by the query
    # that reads it (Python: ModelFormatError "value code … past the codebook"; C: NW_E_DAMAGED);
    # a query that does not read it answers as before
    src = qmodels["jm2-q5"]
    arrays = read_model(src).arrays
    cb_len = len(arrays["BIGI"])
    assert cb_len < 32
    model = nextword.load(src)
    keys = [model.key_of(int(w)) for w in arrays["ALPH"][: model.n_words]]
    rows = arrays["ROWS"].astype(np.int64)
    n = model.n_words
    # an entry i of row v (a word's row, not <s>): set its 5-bit code to 31
    v = int(np.argmax(np.diff(rows)[:n]))
    i = int(rows[v]) + 1
    pos = int(arrays["SUCC"][i])
    assert pos < n
    word, prev = keys[pos], model.key_of(v)
    buf = bytearray(src.read_bytes())
    off, _ = _sections(bytes(buf))[b"CNTS"]
    bit = i * 5
    word16 = buf[off + bit // 8] | (buf[off + bit // 8 + 1] << 8)
    word16 |= 31 << (bit % 8)
    buf[off + bit // 8], buf[off + bit // 8 + 1] = word16 & 0xFF, word16 >> 8
    _recrc(buf)
    path = tmp_path / "past.nwm"
    path.write_bytes(bytes(buf))
    with pytest.raises(nextword.ModelFormatError, match="past the codebook"):
        nextword.load(path, verify=True)
    bad = nextword.load(path)  # a plain load does not read every code
    code, msg, m = native.open(path)
    assert code == 0, msg
    s = native.session(m)
    try:
        with pytest.raises(nextword.ModelFormatError, match="past the codebook"):
            bad.prob_after(word, [prev])
        assert native.prob(s, word, [prev])[0] == NW_E_DAMAGED
        # suggest reads the entry if it is a candidate (a stored skyband may leave it out): both agree
        typed = prev + " " + word[:1]
        try:
            theirs = bad.suggest(typed, 3)
        except nextword.ModelFormatError as e:
            assert "past the codebook" in str(e)
            assert native.suggest(s, typed, 3)[0] == NW_E_DAMAGED
        else:
            code, ours = native.suggest(s, typed, 3)
            assert code == 0 and _same(ours, theirs)
        # another history's row: both answer, the same
        other = model.key_of(v + 1 if v + 1 < n else v - 1)
        code, p = native.prob(s, word, [other])
        assert code == 0 and p == bad.prob_after(word, [other])
    finally:
        _close(native, m, s)


# -- hostile 1.5 files under the sanitizers ---------------------------------------------------------


@pytest.fixture(scope="module")
def quant_seeds(tmp_path_factory: pytest.TempPathFactory) -> dict[str, bytes]:
    """Small valid 1.5 files of every kind (the messages of tests/test_load_bounds.py), to mutate."""
    import test_load_bounds  # the same seed messages as the Python reader's hostile tests

    d = tmp_path_factory.mktemp("quant-seeds")
    msgs = test_load_bounds.MSGS
    seeds: dict[str, bytes] = {}
    for bits in (2, 5):
        for name, kw in (("jm2", {}), ("kn2", dict(smoothing="kn")), ("jm3", dict(order=3)), ("kn3", dict(smoothing="kn", order=3))):
            path = d / f"{name}-q{bits}.nwm"
            nextword.train_texts(msgs, path, min_count=1, skyband_min=1, skyband_k=2, quantize=bits, **kw)  # type: ignore[arg-type]
            seeds[f"{name}-q{bits}"] = path.read_bytes()
    for name, cut in (("jm2-q2", 50), ("kn3-q5", 300)):  # pruned: dropped mass (a file read back keeps its words)
        chunks, _ = prune_model(nextword.load(d / f"{name}.nwm"), len(seeds[name]) - cut)
        atomic_write(d / f"{name}-pruned.nwm", chunks)
        seeds[f"{name}-pruned"] = (d / f"{name}-pruned.nwm").read_bytes()
        assert len(read_model(d / f"{name}-pruned.nwm").arrays["HDRI"]) > 0
    return seeds


def test_hostile_quantised_files_give_error_codes_never_a_crash(fuzz_driver: Path, quant_seeds: dict[str, bytes],
                                                                tmp_path: Path) -> None:
    # every mutant of a 1.5 file in the sanitizer build (tests/test_native.py's check)
    check_mutants_under_sanitizers(fuzz_driver, quant_seeds, 1500, 3, tmp_path)


def test_fuzz_random_mutations_of_quantised_files_under_sanitizers(fuzz_driver: Path, quant_seeds: dict[str, bytes],
                                                                   tmp_path: Path) -> None:
    # the driver's own mutations (random bytes, and crafted files with fixed checksums) of every 1.5 seed
    seeds = []
    for name, data in quant_seeds.items():
        (tmp_path / f"{name}.nwm").write_bytes(data)
        seeds.append(str(tmp_path / f"{name}.nwm"))
    proc = subprocess.run([str(fuzz_driver), "--mutate", "500", "--seed", "9", *seeds], capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "iterations" in proc.stdout
