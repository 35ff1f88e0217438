"""Order-3 models (two-word context): Kneser-Ney and Jelinek-Mercer against dict oracles.

Kneser-Ney: :class:`nextword.reference_kn.DictKneserNey` (checked by hand and against
nltk in tests/test_reference_kn.py). Jelinek-Mercer: :class:`DictJMTrigram` below, the
textbook interpolation (Jelinek & Mercer 1980; Chen & Goodman 1998, section 2.3) written
with plain dicts, scoring every word:

    P(w | u v) = λ3·c(u v w)/c(u v •) + (1 − λ3)·[λ2·c(v w)/c(v •) + (1 − λ2)·c(w)/N]

a context never seen (c = 0) leaving its level out. Both use the engine's text rules and
vocabulary rule (through DictKneserNey's constructor); nothing else is shared.
"""

from __future__ import annotations

import math
import os
import random
from collections import Counter
from collections.abc import Sequence
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword.counts import DEFAULT_MIN_COUNT
from nextword.errors import InvalidArgumentError
from nextword.reference_kn import DictKneserNey, ngrams_of_sentence
from nextword.text import BOS, UNK, fold, parse_typed, sentences
from test_model_kn import (
    SETTINGS,
    WORDS,
    check_probabilities,
    check_rankings,
    check_suggest,
    contexts_for,
    oracle_like,
    random_messages,
)


class DictJMTrigram:
    """Jelinek-Mercer order 3 from dict counts; the same public surface the checks use."""

    def __init__(self, messages: Sequence[str], *, lam2: float, lam3: float, min_count: int = DEFAULT_MIN_COUNT) -> None:
        vocab_from = DictKneserNey(messages, order=3, min_count=min_count)  # the vocabulary rule only
        self.vocab = vocab_from.vocab
        self.outcomes = vocab_from.outcomes
        self._ref = vocab_from
        self.lam2, self.lam3 = lam2, lam3
        known = set(self.vocab)
        self.grams: Counter[tuple[str, ...]] = Counter()
        for message in messages:
            for sent in sentences(message):
                toks = [UNK if t is None or fold(t) not in known else fold(t) for t in sent]
                self.grams.update(ngrams_of_sentence(toks, 3))
        self.rows: dict[tuple[str, ...], Counter[str]] = {}
        for g, c in self.grams.items():
            self.rows.setdefault(g[:-1], Counter())[g[-1]] += c
        self.N = sum(self.rows[()].values())

    def _context(self, context: list[str]) -> tuple[str, ...]:
        return self._ref._context(context)

    def prob_key(self, w: str, h: tuple[str, ...]) -> float:
        p = self.rows[()].get(w, 0) / self.N
        if h:
            row = self.rows.get(h[-1:])
            if row:
                p = self.lam2 * (row.get(w, 0) / sum(row.values())) + (1 - self.lam2) * p
        if len(h) == 2:
            row = self.rows.get(h)
            if row:
                p = self.lam3 * (row.get(w, 0) / sum(row.values())) + (1 - self.lam3) * p
        return p

    def prob(self, word: str, context: list[str]) -> float:
        return self.prob_key(self._ref._key(word), self._context(context))

    def rank(self, context: list[str], prefix: str, k: int) -> list[tuple[str, float]]:
        h = self._context(context)
        scored = [(self.prob_key(w, h), self.rows[()].get(w, 0), w) for w in self.vocab if w.startswith(fold(prefix))]
        scored.sort(key=lambda t: (-t[0], -t[1], t[2]))  # ties: the larger floor c(w)/N, then the key
        return [(w, s) for s, _, w in scored[:k]]


def _train(messages: list[str], path: Path, smoothing: str, **kw: object) -> nextword.Model | None:
    try:
        nextword.train_texts(messages, path, smoothing=smoothing, order=3, **kw)  # type: ignore[arg-type]
    except nextword.InputDataError:
        return None
    except InvalidArgumentError as e:
        assert "vocabulary is empty" in str(e)
        return None
    return nextword.load(path, verify=True)


@SETTINGS
@given(seed=st.integers(0, 10**6), n_messages=st.integers(3, 60), vocab_size=st.integers(2, len(WORDS)),
       min_count=st.sampled_from([1, 2]), small_bands=st.booleans(), smoothing=st.sampled_from(["kn", "jm"]))
def test_random_corpora_equal_the_oracles(tmp_path_factory: pytest.TempPathFactory, seed: int, n_messages: int,
                                          vocab_size: int, min_count: int, small_bands: bool, smoothing: str) -> None:
    rng = random.Random(seed)
    vocab = WORDS[:vocab_size]
    messages = random_messages(rng, n_messages, vocab)
    extra: dict[str, object] = {"skyband_min": 2, "skyband_k": 3} if small_bands else {}
    if smoothing == "jm":
        lam2, lam3 = rng.choice([0.9, 0.5, 0.0]), rng.choice([0.9, 0.3, 0.999])
        extra.update(lam=lam2, lam3=lam3)
    model = _train(messages, tmp_path_factory.mktemp("tri") / "m.nwm", smoothing, min_count=min_count, **extra)
    if model is None:
        return
    assert (model.estimator, model.order, model.format_version) == (smoothing, 3, (1, 4))
    oracle: DictKneserNey | DictJMTrigram
    if smoothing == "kn":
        oracle = oracle_like(model, messages, min_count=min_count)
    else:
        oracle = DictJMTrigram(messages, lam2=lam2, lam3=lam3, min_count=min_count)
    ctxs = contexts_for(rng, vocab, 3) + [[BOS, BOS], ["zebra", vocab[0]], [vocab[0], "zebra"]]
    check_probabilities(model, oracle, ctxs)  # type: ignore[arg-type]
    check_rankings(model, oracle, ctxs, ["", "b", "br", "t", "th", "x", "B"], [1, 2, 3, 5, 20])  # type: ignore[arg-type]
    typed = ["", "The b", "the ", "fix the b", "Bike. T", "Bike t", "42 b", "a BR", "zebra ", "the bike "]
    check_suggest(model, oracle, typed, 3)  # type: ignore[arg-type]


def test_jm_query_lam_replaces_both_weights(tmp_path: Path) -> None:
    rng = random.Random(3)
    messages = random_messages(rng, 80, WORDS)
    model = _train(messages, tmp_path / "m.nwm", "jm", min_count=1, skyband_min=2, skyband_k=3)
    assert model is not None
    ctxs = contexts_for(rng, WORDS, 3)
    for lam in (0.0, 0.4, 1.0):  # 1.0: every unseen word scores 0 and ranks by key
        oracle = DictJMTrigram(messages, lam2=lam, lam3=lam, min_count=1)
        for ctx in ctxs:
            for p in ["", "b", "t"]:
                got = model.rank_after(ctx, p, 4, lam=lam)
                assert got == [(w, pytest.approx(s, rel=1e-12, abs=0)) for w, s in oracle.rank(ctx, p, 4)], (lam, ctx, p)


@pytest.fixture(scope="module")
def pydoc_lines() -> list[str]:
    from pydoc_data.topics import topics  # real English shipped with CPython (as tests/test_reference.py)

    return "\n".join(topics[k] for k in sorted(topics)).splitlines()[:2500]


@pytest.mark.parametrize("smoothing", ["kn", "jm"])
def test_real_text_equals_the_oracles(pydoc_lines: list[str], tmp_path: Path, smoothing: str) -> None:
    model = _train(pydoc_lines, tmp_path / "m.nwm", smoothing)
    assert model is not None
    oracle: DictKneserNey | DictJMTrigram = (
        oracle_like(model, pydoc_lines) if smoothing == "kn" else DictJMTrigram(pydoc_lines, lam2=0.9, lam3=0.9)
    )
    rng = random.Random(11)
    common = oracle.vocab[:150]
    ctxs = [[BOS], [BOS, "the"], ["of", "the"], ["is", "a"], ["the", "zyzzyva"], ["<unk>", "<unk>"]]
    ctxs += [[rng.choice(common), rng.choice(common)] for _ in range(6)]
    check_probabilities(model, oracle, ctxs[:6])  # type: ignore[arg-type]
    check_rankings(model, oracle, ctxs, ["", "t", "a", "pr", "s", "re", "x"], [1, 3, 8, 12])  # type: ignore[arg-type]
    check_suggest(model, oracle, ["The ", "the m", "Return the v", "If x is ", "In the c", "A"], 5)  # type: ignore[arg-type]
    # perplexity on the next lines of the same text equals the oracle's
    from pydoc_data.topics import topics

    held = "\n".join(topics[k] for k in sorted(topics)).splitlines()[2500:2700]
    logs, n = 0.0, 0
    for line in held:
        for sent in sentences(line):
            ctx = [BOS]
            for t in ["<unk>" if t is None else t for t in sent] + ["</s>"]:
                logs += math.log(oracle.prob(t, ctx))
                n += 1
                ctx.append(t)
    assert model.perplexity(held) == pytest.approx(math.exp(-logs / n), rel=1e-12)


def test_sentence_start_context_is_the_sentence_start_only(tmp_path: Path) -> None:
    # "Fix" opens both sentences: after "Bell. " the context is (<s>,), not ("bell", <s>);
    # the second word's context is (<s>, "fix")
    msgs = ["fix the bell. fix the bike", "the bell rings. fix the bike"] * 3
    model = _train(msgs, tmp_path / "m.nwm", "kn", min_count=1)
    assert model is not None
    assert parse_typed("Bell. Fix t").history == ("<s>", "Fix")
    assert model.prob_after("the", ["bell", BOS, "fix"]) == model.prob_after("the", [BOS, "fix"])
    oracle = oracle_like(model, msgs, min_count=1)
    check_suggest(model, oracle, ["Bell. ", "Bell. Fix ", "bell. fix the b"], 3)


# -- hostile files: a Kneser-Ney trigram file with bytes changed and every checksum fixed --

from nextword.errors import ModelFormatError  # noqa: E402
from nextword.store import ENTRY, HEADER  # noqa: E402

HOSTILE_MSGS = ["the cat sat on the mat"] * 40 + ["the dog sat. a cat ran", "Bo and Abe sat on a mat", "the mat is red"] * 4


@pytest.fixture(scope="module")
def kn3_bytes(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    path = tmp_path_factory.mktemp("hostile") / "kn3.nwm"
    nextword.train_texts(HOSTILE_MSGS, path, smoothing="kn", order=3, min_count=1, skyband_min=1, skyband_k=2)
    return path.read_bytes()


def _recrc(buf: bytearray) -> None:
    """Recompute every section CRC, the table CRC and the header CRC (a crafted file)."""
    import struct
    import zlib

    n_sec = HEADER.unpack_from(buf, 0)[3]
    for i in range(n_sec):
        at = HEADER.size + i * ENTRY.size
        tag, code, off, length, _ = ENTRY.unpack_from(buf, at)
        ENTRY.pack_into(buf, at, tag, code, off, length, zlib.crc32(bytes(buf[off : off + length])))
    table = bytes(buf[HEADER.size : HEADER.size + n_sec * ENTRY.size])
    struct.pack_into("<I", buf, 24, zlib.crc32(table))
    struct.pack_into("<I", buf, 28, zlib.crc32(bytes(buf[:28])))


def _ask_everything(m: nextword.Model) -> None:
    for hist in (["<s>"], ["the"], ["the", "cat"], ["<s>", "the"], ["zz", "on"], ["on", "the"]):
        for w in ("the", "cat", "mat", "</s>", "<unk>", "red"):
            try:
                p = m.prob_after(w, hist)
            except ModelFormatError:
                continue
            assert 0.0 <= p <= 1.0 + 1e-9, (w, hist, p)
        for prefix in ("", "c", "m", "th"):
            for k in (1, 3, 10):
                try:
                    got = m.rank_after(hist, prefix, k)
                except ModelFormatError:
                    continue
                assert all(0.0 <= p <= 1.0 + 1e-9 for _, p in got)
    for typed in ("", "the ", "the c", "Bo a", "on the m"):
        try:
            m.suggest(typed, 3)
        except ModelFormatError:
            pass
    try:
        m.perplexity(HOSTILE_MSGS[-3:])
    except ModelFormatError:
        pass


def test_the_undamaged_kn_trigram_file_answers_everything(kn3_bytes: bytes, tmp_path: Path) -> None:
    (tmp_path / "m.nwm").write_bytes(kn3_bytes)
    m = nextword.load(tmp_path / "m.nwm", verify=True)
    assert m.rank_after(["on", "the"], "", 1)[0][0] == "mat"
    _ask_everything(m)


@settings(max_examples=int(os.environ.get("NW_HOSTILE_EXAMPLES", "60")), deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_crafted_kn_trigram_files_raise_only_model_format_errors(kn3_bytes: bytes, tmp_path_factory: pytest.TempPathFactory,
                                                                 data: st.DataObject) -> None:
    # only ModelFormatError may come out of load or any query: no IndexError, no crash, no P > 1
    mutate_and_ask(kn3_bytes, data, tmp_path_factory)


def mutate_and_ask(model_bytes: bytes, data: st.DataObject, tmp_path_factory: pytest.TempPathFactory,
                   favoured: Sequence[bytes] = ()) -> None:
    """Random bytes in one section (any but the trie; ``favoured`` ones drawn 4× as often), every CRC fixed; then
    loading (with and without verify) and every query kind may raise only ModelFormatError.

    The trie is parsed by libmarisa, trusted after its CRC (FORMAT.md §8).
    """
    buf = bytearray(model_bytes)
    n_sec = HEADER.unpack_from(buf, 0)[3]
    spans = {}
    for i in range(n_sec):
        tag, _, off, length, _ = ENTRY.unpack_from(buf, HEADER.size + i * ENTRY.size)
        if tag != b"TRIE" and length:
            spans[tag] = (off, length)
    tag = data.draw(st.sampled_from(sorted(spans) + [t for t in favoured if t in spans] * 3))
    off, length = spans[tag]
    for i, b in data.draw(st.lists(st.tuples(st.integers(0, length - 1), st.integers(0, 255)), min_size=1, max_size=4)):
        buf[off + i] = b
    _recrc(buf)
    path = tmp_path_factory.mktemp("bad") / "bad.nwm"
    path.write_bytes(bytes(buf))
    for verify in (False, True):
        try:
            m = nextword.load(path, verify=verify)
        except ModelFormatError:
            continue
        _ask_everything(m)
