"""Format 1.6: successor lists and starts coded by chunked Elias-Fano (docs/FORMAT.md §7.18).

What must hold for every estimator, order, value codec and pruning:

* the chunked Elias-Fano coder returns every value, slice, gather and lower bound that
  numpy (the reference: ``np.searchsorted`` over the plain array) gives for the same
  sequence — property test over random non-decreasing sequences with runs and jumps;
* a 1.6 file is the same model as its 1.4/1.5 twin: every probability and every ranking
  equal (so the 1.4/1.5 tests' brute-force checks carry over), and its own probabilities
  sum to 1 per context and rank like a brute force over every word (hypothesis);
* ``verify=True`` decodes everything and checks it as the plain layout;
* hostile 1.6 files (damaged headers, streams, padding, META; random bytes with every CRC
  fixed) raise ``ModelFormatError`` and nothing else;
* ``train(compact=True)``, ``--compact``, pruning to a size and ``prune_model`` write 1.6.

The brute force shares only the text rules with the ranking code (``prob_after`` for
every word); tests/test_format_doc.py checks 1.6 files with a reader written from the
document alone.
"""

from __future__ import annotations

import os
import random
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, reject, settings
from hypothesis import strategies as st

import nextword
from nextword.codecs import EXACT, QuantCodec
from nextword.counts import CountBuilder
from nextword.errors import InvalidArgumentError, ModelFormatError
from nextword.estimators import JelinekMercer, KneserNey
from nextword.prune import keep_contexts, ngram_file, prune_fitted, prune_model, write_to_size
from nextword.store import ENTRY, HEADER, atomic_write, read_model
from nextword.succinct import CHUNK, ChunkedEF, ef_check_headers, ef_encode
from test_dropped_mass import _recrc  # the file's CRCs after an edit
from test_model_trigram import _ask_everything, mutate_and_ask  # every query kind, answers in [0, 1] or ModelFormatError
from test_quant import HOSTILE_MSGS, WORDS, _minor, _patched, _sections, _with_meta, brute_force, check_rankings, check_sums, contexts_of, random_messages

SETTINGS = settings(max_examples=int(os.environ.get("NW_COMPACT_EXAMPLES", "25")), deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])


# -- the coder ----------------------------------------------------------------------------


@st.composite
def monotone(draw: st.DrawFn) -> np.ndarray:
    """Non-decreasing sequences with runs of equal values, small steps and big jumps."""
    steps = draw(st.lists(st.one_of(st.just(0), st.integers(0, 3), st.integers(0, 10**6)), max_size=300))
    start = draw(st.integers(0, 10**6))
    return start + np.cumsum(np.asarray(steps, dtype=np.int64)) if steps else np.zeros(0, dtype=np.int64)


@settings(max_examples=300, deadline=None)
@given(y=monotone(), data=st.data())
def test_chunked_elias_fano_answers_what_the_plain_array_answers(y: np.ndarray, data: st.DataObject) -> None:
    head, stream = ef_encode(y)
    ef_check_headers("t", "seq", head, stream, len(y), strict=False)
    ef = ChunkedEF("t", "seq", head, stream, len(y), cache=3)
    assert np.array_equal(ef.all(), y)
    assert ef.end() == (int(y[-1]) + 1 if len(y) else 0)
    # the size is what Elias-Fano promises per chunk: ≤ m·(2 + ⌈log₂(range/m)⌉) + 1 bits (common practice)
    assert int(head[-1]) <= sum(min(CHUNK, len(y) - c) * (3 + max(0, int(np.log2(max(int(head[2 * (c // CHUNK) + 2])
                                                                                     - int(head[2 * (c // CHUNK)]), 1)))))
                                for c in range(0, len(y), CHUNK)) + 1
    if len(y) == 0:
        return
    s = data.draw(st.integers(0, len(y) - 1))
    e = data.draw(st.integers(s, len(y)))
    assert np.array_equal(ef.slice(s, e), y[s:e])
    idx = np.asarray(data.draw(st.lists(st.integers(0, len(y) - 1), max_size=40)), dtype=np.int64)
    assert np.array_equal(ef.take(idx), y[idx])
    for q in data.draw(st.lists(st.integers(0, int(y[-1]) + 2), min_size=1, max_size=10)):
        assert ef.lower_bound(q, s, e) == s + int(np.searchsorted(y[s:e], q, side="left"))
        j = data.draw(st.integers(0, len(y) - 1))
        assert ef.at(j) == int(y[j])


def test_strict_sequences_have_no_chunk_narrower_than_its_values() -> None:
    y = np.arange(0, 200, dtype=np.int64)
    head, stream = ef_encode(y)
    ef_check_headers("t", "seq", head, stream, len(y), strict=True)
    bad = head.copy()
    bad[2] = bad[0] + 10  # chunk 1 starts 10 after chunk 0: too close for 64 distinct values
    with pytest.raises(ModelFormatError):
        ef_check_headers("t", "seq", bad, stream, len(y), strict=True)


def test_a_strict_sequence_whose_last_chunk_is_too_narrow_is_refused() -> None:
    # one chunk of 15 distinct values needs a range ≥ 15 (§7.18: F_{c+1} − F_c ≥ m_c, the last chunk included)
    y = np.arange(15, dtype=np.int64)
    head, stream = ef_encode(y)
    narrow = ef_encode(np.concatenate([np.zeros(5, np.int64), np.arange(10, dtype=np.int64)]))  # non-decreasing, range 10
    ef_check_headers("t", "seq", *narrow, 15, strict=False)
    with pytest.raises(ModelFormatError, match="not increasing"):
        ef_check_headers("t", "seq", *narrow, 15, strict=True)
    with pytest.raises(ModelFormatError, match="does not decode"):  # the same check when a chunk is read
        ChunkedEF("t", "seq", *narrow, 15, strict=True).at(0)
    assert ChunkedEF("t", "seq", head, stream, 15, strict=True).at(14) == 14


def test_coder_refuses_what_the_headers_cannot_hold() -> None:
    with pytest.raises(InvalidArgumentError, match="non-decreasing"):
        ef_encode(np.array([3, 2]))
    with pytest.raises(InvalidArgumentError, match="32-bit"):
        ef_encode(np.array([1 << 33]))


# -- whole files --------------------------------------------------------------------------


def _twins(path: Path, msgs: list[str], smoothing: str, order: int, codec, *, prune_seed: int | None = None,
           skyband: bool = True) -> tuple[nextword.Model, nextword.Model]:
    """The same fitted model as a 1.4/1.5 file and as a 1.6 file (both verified)."""
    b = CountBuilder(order=order)
    b.add_texts(msgs)
    tables, counts = b.ngram_counts(min_count=1)
    est = KneserNey() if smoothing == "kn" else JelinekMercer((0.8, 0.7)[: order - 1])
    fitted = est.fit(counts)
    if prune_seed is not None:
        rng = np.random.default_rng(prune_seed)
        keep = [None] + [rng.random(len(lev.grams)) < 0.6 for lev in fitted.levels[1:]]
        fitted = prune_fitted(fitted, keep_contexts(fitted, keep))
    extra = {"skyband_min": 1, "skyband_k": 3} if skyband else {}
    plain, compact = path.with_suffix(".plain.nwm"), path.with_suffix(".compact.nwm")
    if smoothing == "jm" and order == 2 and codec is EXACT:  # the exact JM bigram's plain twin: the 1.4 layout of the same model
        from nextword.store import build_ngram_sections, compact_sections, encode_sections

        sections, minor = build_ngram_sections(counts, tables, None, fitted=fitted, codec=codec, compact=True, **extra)
        atomic_write(compact, encode_sections(sections, minor=minor))
        return nextword.load(compact, verify=True), nextword.load(compact, verify=True)
    atomic_write(plain, ngram_file(counts, tables, fitted, codec=codec, **extra))
    atomic_write(compact, ngram_file(counts, tables, fitted, codec=codec, compact=True, **extra))
    return nextword.load(plain, verify=True), nextword.load(compact, verify=True)


@SETTINGS
@given(seed=st.integers(0, 10**6), n_messages=st.integers(3, 60), vocab_size=st.integers(2, len(WORDS)),
       smoothing=st.sampled_from(["jm", "kn"]), order=st.sampled_from([2, 3]), quant=st.sampled_from([None, 3]),
       pruned=st.booleans())
def test_a_compact_file_is_the_same_model(tmp_path_factory: pytest.TempPathFactory, seed: int, n_messages: int,
                                          vocab_size: int, smoothing: str, order: int, quant: int | None, pruned: bool) -> None:
    rng = random.Random(seed)
    msgs = random_messages(rng, n_messages, WORDS[:vocab_size])
    codec = EXACT if quant is None else QuantCodec(quant)
    try:
        plain, compact = _twins(tmp_path_factory.mktemp("c") / "m.nwm", msgs, smoothing, order, codec,
                                prune_seed=seed if pruned else None)
    except InvalidArgumentError:  # a corpus too small for the estimator (e.g. no KN discount) is not the point here
        reject()
    assert compact.format_version == (1, 6) and compact.info()["successors"] == {"name": "ef", "version": 1}
    ctxs = contexts_of(compact, rng)
    check_sums(compact, ctxs)
    check_rankings(compact, ctxs, ["", "b", "t", "ch", "zz"], [1, 2, 3, 5])
    outcomes = compact.word_keys() + ["</s>", "<unk>"]
    for ctx in ctxs:
        assert [compact.prob_after(w, ctx) for w in outcomes] == [plain.prob_after(w, ctx) for w in outcomes]
        for prefix in ("", "b", "t"):
            assert compact.rank_after(ctx, prefix, 4) == plain.rank_after(ctx, prefix, 4)
    for typed in ("", "the ", "fix b", "the bike t"):
        assert compact.suggest(typed, 3) == plain.suggest(typed, 3)
    # the stored n-grams read back through the compact lists are the plain file's
    a, b = plain.stored_ngrams(), compact.stored_ngrams()
    for ga, gb, va, vb in zip(a.grams, b.grams, a.counts, b.counts):
        assert np.array_equal(ga, gb) and np.array_equal(va, vb)


def test_a_real_corpus_compact_file_answers_like_its_plain_twin(tmp_path: Path) -> None:
    # a text long enough for chunks of 64, rows of thousands of successors and skybands (Python's own docs, as the
    # other real-corpus tests use: tests/test_format_doc.py)
    from test_format_doc import _pydoc_lines

    msgs = _pydoc_lines(3000)
    plain, compact = _twins(tmp_path / "m.nwm", msgs, "kn", 3, QuantCodec(5), skyband=False)
    assert compact.file_size < 0.8 * plain.file_size
    rng = random.Random(5)
    for _ in range(150):
        m = rng.choice(msgs)
        cut = rng.randrange(len(m) + 1)
        for k in (1, 3, 8, 12):
            assert compact.suggest(m[:cut], k) == plain.suggest(m[:cut], k), (m[:cut], k)
    assert compact.perplexity(msgs[:200]) == plain.perplexity(msgs[:200])


def test_a_trigram_without_its_suffix_bigram_has_no_compact_form(tmp_path: Path) -> None:
    b = CountBuilder(order=3)
    b.add_texts(HOSTILE_MSGS)
    tables, counts = b.ngram_counts(min_count=1)
    fitted = KneserNey().fit(counts)
    g2, g3 = fitted.levels[1].grams, fitted.levels[2].grams
    # drop the bigram (v, </s>) of a trigram (u, v, </s>): no trigram has it as its context
    u, v, w = (int(x) for x in g3[g3[:, 2] == counts.n_words][0])  # </s> is id n
    keep2 = ~((g2[:, 0] == v) & (g2[:, 1] == w))
    keep3 = np.ones(len(g3), bool)
    fitted = prune_fitted(fitted, [None, keep2, keep3])
    with pytest.raises(InvalidArgumentError, match=r"bigram \(v, w\) is not stored"):
        ngram_file(counts, tables, fitted, compact=True)
    # the pruning rule keeps it: a kept trigram keeps its suffix bigram
    kept = keep_contexts(fitted, [None, keep2, keep3])
    assert kept[1] is not None and bool(kept[1][~keep2].all())


# -- hostile files ------------------------------------------------------------------------


@pytest.fixture(scope="module")
def c3_bytes(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    path = tmp_path_factory.mktemp("hostile") / "c3.nwm"
    nextword.train_texts(HOSTILE_MSGS, path, smoothing="kn", order=3, min_count=1, skyband_min=1, skyband_k=2, quantize=3,
                         compact=True)
    return path.read_bytes()


@pytest.fixture(scope="module")
def c2_bytes(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    path = tmp_path_factory.mktemp("hostile") / "c2.nwm"
    nextword.train_texts(HOSTILE_MSGS, path, min_count=1, skyband_min=1, skyband_k=2, compact=True)
    return path.read_bytes()


def test_the_undamaged_compact_files_answer_everything(c3_bytes: bytes, c2_bytes: bytes, tmp_path: Path) -> None:
    for name, data, top in (("kn3", c3_bytes, "mat"), ("jm2", c2_bytes, "cat")):
        (tmp_path / f"{name}.nwm").write_bytes(data)
        m = nextword.load(tmp_path / f"{name}.nwm", verify=True)
        assert m.format_version == (1, 6)
        assert m.rank_after(["on", "the"], "", 1)[0][0] == top
        _ask_everything(m)


def _head_value(data: bytes, tag: bytes, i: int, delta: int) -> bytes:
    code, off, _ = _sections(data)[tag]
    width = 4 if code == 3 else 8
    old = int.from_bytes(data[off + i * width : off + (i + 1) * width], "little")
    return _patched(data, tag, i * width, (old + delta).to_bytes(width, "little"))


@pytest.mark.parametrize("change,message", [
    (lambda d: _head_value(d, b"SEFH", 1, 1), "chunk offsets do not start at 0"),
    (lambda d: _head_value(d, b"SEFH", 3, 1), "has .* bits, its values need|do not match their sizes"),
    (lambda d: _head_value(d, b"TEFH", 2, -1), "has .* bits, its values need|not increasing|do not match their sizes"),
    (lambda d: _head_value(d, b"TPTH", 0, 1), "TPTH/TPTB do not run from 0|has .* bits|do not match their sizes"),
    (lambda d: _patched(d, b"SEFB", -1, b"\x01"), "padding is not zero|bits set past its end"),
    (lambda d: _patched(d, b"RWEB", -1, b"\x80"), "padding is not zero|bits set past its end"),
    (lambda d: _with_meta(d, {"dropped_contexts": [10**9, 0]}), "'dropped_contexts' is invalid"),
    (lambda d: _with_meta(d, {"dropped_contexts": [0]}), "'dropped_contexts' is invalid"),
    (lambda d: _head_value(d, b"UNEH", 0, 1), "UNEH/UNEB do not hold prefix sums from 0|has .* bits"),
    (lambda d: _patched(d, b"ALPH", 0, d[_sections(d)[b"ALPH"][1] + 2 : _sections(d)[b"ALPH"][1] + 4]), "not a valid permutation"),
    (lambda d: _with_meta(d, {"successors": {"name": "ef", "version": 2}}), "unknown successor layout"),
    (lambda d: _with_meta(d, {"successors": {"name": "xx", "version": 1}}), "unknown successor layout"),
    (lambda d: _minor(d, 5), "missing sections|'successors' belongs to format 1.6"),
])
def test_crafted_compact_files_are_refused_by_name(c3_bytes: bytes, tmp_path: Path, change, message: str) -> None:
    bad = tmp_path / "bad.nwm"
    bad.write_bytes(change(c3_bytes))
    with pytest.raises(ModelFormatError, match=message):
        nextword.load(bad, verify=True)
    try:  # a plain load checks the n-gram-sized sequences' chunks when a query decodes them (§7.18)
        m = nextword.load(bad)
    except ModelFormatError:
        return
    _ask_everything(m)


def test_a_plain_file_claiming_the_compact_layout_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "q.nwm"
    nextword.train_texts(HOSTILE_MSGS, path, smoothing="kn", order=3, min_count=1, quantize=3)
    bad = tmp_path / "bad.nwm"
    bad.write_bytes(_with_meta(path.read_bytes(), {"successors": {"name": "ef", "version": 1}}))
    with pytest.raises(ModelFormatError, match="'successors' belongs to format 1.6"):
        nextword.load(bad)
    bad.write_bytes(_minor(path.read_bytes(), 6))
    with pytest.raises(ModelFormatError, match="'successors' belongs to format 1.6|missing sections"):
        nextword.load(bad)


def test_the_compact_layout_field_is_refused_in_a_plain_bigram_file(tmp_path: Path) -> None:
    path = tmp_path / "m.nwm"
    nextword.train_texts(HOSTILE_MSGS, path, min_count=1)  # format 1.0
    bad = tmp_path / "bad.nwm"
    bad.write_bytes(_with_meta(path.read_bytes(), {"successors": {"name": "ef", "version": 1}}))
    with pytest.raises(ModelFormatError, match="'successors' belongs to format 1.6"):
        nextword.load(bad)


def test_a_damaged_chunk_is_refused_when_a_query_reads_it(c3_bytes: bytes, tmp_path: Path) -> None:
    # flip bits inside the successor streams (sizes unchanged): a plain load checks headers only, so the
    # queries that decode a damaged chunk must refuse it (or answer within [0, 1]); verify=True refuses the file
    rng = random.Random(4)
    for tag in (b"SEFB", b"TEFB", b"TPTB"):
        _, off, length = _sections(c3_bytes)[tag]
        for _ in range(6):
            buf = bytearray(c3_bytes)
            i = rng.randrange(max(length - 8, 1))
            buf[off + i] ^= 1 << rng.randrange(8)
            _recrc(buf)
            bad = tmp_path / "bad.nwm"
            bad.write_bytes(bytes(buf))
            try:
                nextword.load(bad, verify=True)
            except ModelFormatError:
                pass
            else:
                raise AssertionError(f"verify=True accepted a flipped bit in {tag!r}")
            try:
                m = nextword.load(bad)
            except ModelFormatError:
                continue
            _ask_everything(m)


@settings(max_examples=int(os.environ.get("NW_HOSTILE_EXAMPLES", "60")), deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=st.data(), which=st.sampled_from(["kn3", "jm2"]))
def test_crafted_compact_files_raise_only_model_format_errors(c3_bytes: bytes, c2_bytes: bytes,
                                                              tmp_path_factory: pytest.TempPathFactory,
                                                              data: st.DataObject, which: str) -> None:
    # random bytes in any section but the trie, every CRC fixed; the Elias-Fano sections more often (what 1.6 adds)
    model = c3_bytes if which == "kn3" else c2_bytes
    mutate_and_ask(model, data, tmp_path_factory, [t for t in _sections(model) if t[3:] in (b"H", b"B")])


# -- training, pruning, command line ------------------------------------------------------


@pytest.mark.parametrize("smoothing,order,quantize", [("jm", 2, None), ("kn", 3, 5)])
def test_write_to_size_and_prune_model_keep_the_compact_layout(tmp_path: Path, smoothing: str, order: int,
                                                                quantize: int | None) -> None:
    from test_format_doc import _pydoc_lines

    msgs = _pydoc_lines(1500)
    b = CountBuilder(order=order)
    b.add_texts(msgs)
    tables, counts = b.ngram_counts(min_count=1)
    est = KneserNey() if smoothing == "kn" else JelinekMercer((0.9, 0.9)[: order - 1])
    full = tmp_path / "full.nwm"
    nextword.train_texts(msgs, full, smoothing=smoothing, order=order, min_count=1, quantize=quantize, compact=True)
    budget = int(full.stat().st_size * 0.8)
    out = tmp_path / "small.nwm"
    write_to_size(counts, tables, est, budget, out, quantize=quantize, compact=True)
    small = nextword.load(out, verify=True)
    assert small.format_version == (1, 6) and small.file_size <= budget
    chunks, _ = prune_model(nextword.load(full), int(full.stat().st_size * 0.92))
    again = tmp_path / "again.nwm"
    atomic_write(again, chunks)
    pruned = nextword.load(again, verify=True)
    assert pruned.format_version == (1, 6) and pruned.codec.meta() == nextword.load(full).codec.meta()
    rng = random.Random(2)
    ctxs = contexts_of(pruned, rng)
    check_sums(pruned, ctxs[:4])
    check_rankings(pruned, ctxs[:4], ["", "t"], [1, 3])


def test_cli_train_compact(tmp_path: Path) -> None:
    corpus = tmp_path / "c.txt"
    corpus.write_text("\n".join(HOSTILE_MSGS) + "\n", encoding="utf-8")
    out = tmp_path / "m.nwm"
    r = subprocess.run([sys.executable, "-m", "nextword", "train", str(corpus), "-o", str(out), "--min-count", "1",
                        "--order", "3", "--smoothing", "kn", "--quantize", "5", "--compact", "--json"],
                       capture_output=True, text=True, env={**os.environ, "PYTHONPATH": str(Path(__file__).parents[1])})
    assert r.returncode == 0, r.stderr
    m = nextword.load(out, verify=True)
    assert m.format_version == (1, 6) and m.info()["successors"] == {"name": "ef", "version": 1}
    assert read_model(out).meta["codec"] == {"name": "quant", "version": 2, "bits": 5}  # a compact file elides the ones
