"""Invariants checked on random corpora (hypothesis), against the plain-dict oracle.

The oracle (nextword/baselines.py, DictBigram) scores every vocabulary word by the formula and
sorts; the engine must return exactly the same words, in the same order, with the same
probabilities, whatever the corpus, λ, k, context or prefix, and whatever the build
settings that switch its candidate search between strategies.
"""

from __future__ import annotations

import math
import tempfile
from unittest.mock import patch
from pathlib import Path

import pytest
from nextword.baselines import DictBigram
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

import nextword
from nextword import ModelFormatError

WORDS = ["a", "ab", "abc", "b", "ba", "bab", "c", "ca", "cab", "cc", "Abe", "Bo", "don't", "x-ray", "ä", "äb"]
PUNCT = [" ", " ", " ", ", ", ". ", "! ", " 42 ", " £ ", "\n"]


@st.composite
def corpora(draw: st.DrawFn) -> list[str]:
    n_msgs = draw(st.integers(1, 12))
    msgs = []
    for _ in range(n_msgs):
        n = draw(st.integers(1, 14))
        parts = []
        for _ in range(n):
            w = draw(st.sampled_from(WORDS))
            if draw(st.integers(0, 9)) == 0:
                w = w.upper()
            parts.append(w)
            parts.append(draw(st.sampled_from(PUNCT)))
        msgs.append("".join(parts).strip() or "a")
    return msgs


lams = st.one_of(st.sampled_from([0.0, 1.0, 0.9, 0.5]), st.floats(0.0, 1.0, allow_nan=False))
histories = st.one_of(st.none(), st.sampled_from(WORDS + ["<unk>", "zzz"]))
prefixes = st.one_of(st.just(""), st.text(alphabet="abcäAB'-x", max_size=3))
build = st.fixed_dictionaries(
    {
        "min_count": st.integers(1, 3),
        "max_vocab": st.integers(1, 20),
        "skyband_min": st.integers(0, 4),
        "skyband_k": st.integers(1, 6),
    }
)

SETTINGS = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _train(msgs: list[str], params: dict[str, int]) -> tuple[nextword.Model, DictBigram]:
    tmp = Path(tempfile.mkdtemp()) / "m.nwm"
    try:
        nextword.train_texts(msgs, tmp, **params)
    except nextword.InvalidArgumentError:
        assume(False)  # no word reached min_count
    oracle = DictBigram(msgs, min_count=params["min_count"], max_vocab=params["max_vocab"])
    return nextword.load(tmp), oracle


@SETTINGS
@given(corpora(), build, st.lists(st.tuples(histories, prefixes, st.integers(1, 9), lams), min_size=1, max_size=8))
def test_ranking_equals_brute_force(msgs: list[str], params: dict[str, int], queries: list) -> None:
    model, oracle = _train(msgs, params)
    for prev, prefix, k, lam in queries:
        want = oracle.rank(prev, prefix, k, lam)
        assert model.rank_ids(prev, prefix, k, lam=lam) == want
        with patch.object(nextword.model, "_SMALL", 0):  # force the vectorised path
            assert model.rank_ids(prev, prefix, k, lam=lam) == want


@SETTINGS
@given(corpora(), build, st.lists(st.tuples(st.text(alphabet="abcAB .,42£'\n", max_size=20), st.integers(1, 6)), max_size=8))
def test_suggest_equals_brute_force_on_typed_text(msgs: list[str], params: dict[str, int], typed: list) -> None:
    model, oracle = _train(msgs, params)
    for text, k in typed:
        got = model.suggest(text, k)
        want = oracle.suggest_keys(text, k, model.lam)
        assert [nextword.text.fold(s.word) for s in got] == [w for w, _ in want]
        assert [s.prob for s in got] == [p for _, p in want]


@SETTINGS
@given(corpora(), build, histories, lams)
def test_probabilities_sum_to_one(msgs: list[str], params: dict[str, int], prev: str | None, lam: float) -> None:
    model, oracle = _train(msgs, params)
    outcomes = [w for w, _ in model.words()] + ["</s>", "<unk>"]
    total = math.fsum(model.prob(w, prev, lam=lam) for w in outcomes)
    assert total == pytest.approx(1.0, abs=1e-12)


@SETTINGS
@given(corpora(), build)
def test_file_round_trip_preserves_every_count(msgs: list[str], params: dict[str, int]) -> None:
    model, oracle = _train(msgs, params)
    assert sorted(nextword.text.fold(w) for w, _ in model.words()) == sorted(oracle.vocab)
    assert model.total == oracle.total
    for v, row in oracle.bigram.items():
        assert model.history_count(None if v == "<s>" else v) == oracle.history[v]
        for w, c in row.items():
            assert model.bigram_count(None if v == "<s>" else v, w) == c
    for w, c in oracle.unigram.items():
        assert model.unigram_count(w) == c
    # writing the same counts again gives the same bytes (deterministic format)
    again = Path(tempfile.mkdtemp()) / "again.nwm"
    nextword.train_texts(msgs, again, **params)
    assert again.read_bytes() == Path(model.path).read_bytes()


def _model_bytes() -> bytes:
    path = Path(tempfile.mkdtemp()) / "m.nwm"
    msgs = ["the cat sat on the mat", "the dog sat. a cat ran", "Bo and Abe sat on a mat"] * 3
    nextword.train_texts(msgs, path, min_count=1, skyband_min=1, skyband_k=2)
    return path.read_bytes()


MODEL = _model_bytes()


def _write(data: bytes) -> Path:
    path = Path(tempfile.mkdtemp()) / "bad.nwm"
    path.write_bytes(data)
    return path


@settings(max_examples=300, deadline=None)
@given(st.data())
def test_any_single_byte_change_is_detected_by_verify(data: st.DataObject) -> None:
    model_bytes = MODEL
    i = data.draw(st.integers(0, len(model_bytes) - 1))
    b = data.draw(st.integers(0, 255).filter(lambda x: x != model_bytes[i]))
    bad = _write(model_bytes[:i] + bytes([b]) + model_bytes[i + 1 :])
    with pytest.raises(ModelFormatError):
        nextword.load(bad, verify=True)


@settings(max_examples=300, deadline=None)
@given(st.data())
def test_changed_files_never_crash_queries(data: st.DataObject) -> None:
    model_bytes = MODEL
    changes = data.draw(st.lists(st.tuples(st.integers(0, len(model_bytes) - 1), st.integers(0, 255)), min_size=1, max_size=4))
    buf = bytearray(model_bytes)
    for i, b in changes:
        buf[i] = b
    path = _write(bytes(buf))
    try:
        m = nextword.load(path)
    except ModelFormatError:
        return
    for text in ["", "the ", "the c", "Bo a", "zz "]:
        try:
            m.suggest(text, 3)
            m.prob("cat", "the")
        except ModelFormatError:
            pass


@settings(max_examples=200, deadline=None)
@given(st.data())
def test_truncated_files_raise(data: st.DataObject) -> None:
    model_bytes = MODEL
    cut = data.draw(st.integers(0, len(model_bytes) - 1))
    with pytest.raises(ModelFormatError):
        nextword.load(_write(model_bytes[:cut]))


def test_appended_bytes_and_foreign_files_raise(tmp_path: Path) -> None:
    model_bytes = MODEL
    with pytest.raises(ModelFormatError, match="header says"):
        nextword.load(_write(model_bytes + b"\0"))
    with pytest.raises(ModelFormatError, match="bad magic"):
        nextword.load(_write(b"PK\x03\x04" + b"\0" * 100))
    with pytest.raises(ModelFormatError, match="cannot open"):
        nextword.load(tmp_path / "missing.nwm")


def test_unsupported_version_is_named() -> None:
    model_bytes = MODEL
    import struct
    import zlib

    head = bytearray(model_bytes[:32])
    head[8:10] = struct.pack("<H", 7)
    head[28:32] = struct.pack("<I", zlib.crc32(bytes(head[:28])))
    with pytest.raises(ModelFormatError, match=r"unsupported format version 7.0 \(this library reads 1.0 to 1.2 and 1.4 to 1.6\)"):
        nextword.load(_write(bytes(head) + model_bytes[32:]))


@pytest.mark.parametrize("skyband_min", [0, 64])
def test_counts_at_and_above_the_one_byte_escape(tmp_path: Path, skyband_min: int) -> None:
    # counts are stored in one byte with 255 as an escape (docs/FORMAT.md §7.8): a pair seen
    # exactly 255 times and pairs seen more must read back exactly on every ranking path
    msgs = ["go b"] * 255 + ["go c"] * 300 + ["go d"] * 254 + ["go e"] * 256 + ["b go"] * 3
    path = tmp_path / "m.nwm"
    nextword.train_texts(msgs, path, min_count=1, skyband_min=skyband_min)
    model, oracle = nextword.load(path, verify=True), DictBigram(msgs, min_count=1)
    for w, c in (("b", 255), ("c", 300), ("d", 254), ("e", 256)):
        assert model.bigram_count("go", w) == c
    for k in (1, 3, 5):
        for lam in (0.9, 0.5, 1.0):
            want = oracle.rank("go", "", k, lam)
            assert model.rank_ids("go", "", k, lam=lam) == want
            with patch.object(nextword.model, "_SMALL", 0):
                assert model.rank_ids("go", "", k, lam=lam) == want
