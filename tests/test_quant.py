"""The quantised value codec (``quant``, format 1.5; docs/FORMAT.md §7.17, docs/SEAMS.md).

What must hold for every estimator (JM, KN), order (2, 3) and code width, pruned or not:

* the quantised model's probabilities sum to 1 over every context (the stored totals
  are sums of the *decoded* values, so the estimator's own algebra gives 1 — checked by
  summing ``prob_after`` over the whole prediction vocabulary);
* ``suggest``/``rank_after`` equal a brute-force ranking that scores every word of the
  prefix with the quantised model's own probabilities (score descending, then the id,
  docs/SEAMS.md "Ties") — the skybands are built from the decoded values;
* the file round-trips: the values read back are exactly the codec's quantisation of
  the fitted values, and encoding them again gives the stored bytes;
* hostile files (bad codebooks, codes, lengths, versions; random bytes with every CRC
  fixed) raise ``ModelFormatError`` and nothing else.

The brute force shares only the text rules with the ranking code (it calls
``prob_after`` for every word); the independent reader of tests/test_format_doc.py
checks the probabilities themselves against docs/FORMAT.md.
"""

from __future__ import annotations

import os
import random
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword.codecs import QUANT_BITS, QuantCodec, fit_codebook
from nextword.counts import CountBuilder
from nextword.errors import InvalidArgumentError, ModelFormatError
from nextword.estimators import JelinekMercer, KneserNey
from nextword.prune import keep_contexts, ngram_file, prune_fitted
from nextword.store import BIGRAM_TAGS, ENTRY, HEADER, TRIGRAM_TAGS, atomic_write, read_model
from nextword.text import EOS, UNK
from test_dropped_mass import _recrc  # the file's CRCs after an edit
from test_model_trigram import _ask_everything, mutate_and_ask  # every query kind, answers in [0, 1] or ModelFormatError

SETTINGS = settings(max_examples=int(os.environ.get("NW_QUANT_EXAMPLES", "30")), deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
WORDS = ["bike", "bell", "brake", "chain", "crank", "the", "a", "lane", "harbor", "tube", "tire", "fix", "is", "to"]


def random_messages(rng: random.Random, n: int, vocab: Sequence[str]) -> list[str]:
    # skewed word choice so that some n-grams repeat often (values well above 3 to quantise)
    weights = [1.0 / (i + 1) for i in range(len(vocab))]
    out = []
    for _ in range(n):
        words = rng.choices(list(vocab), weights=weights, k=rng.randint(1, 9))
        out.append(" ".join(words) + rng.choice(["", ".", ". the bike"]))
    return out


def build_file(path: Path, msgs: list[str], smoothing: str, order: int, bits: int, *, prune_seed: int | None = None,
               skyband: bool = True) -> nextword.Model:
    """A quantised file of ``msgs``; ``prune_seed`` drops a random part of the n-grams first (dropped mass stored)."""
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
    atomic_write(path, ngram_file(counts, tables, fitted, codec=QuantCodec(bits), **extra))
    return nextword.load(path, verify=True)


def contexts_of(model: nextword.Model, rng: random.Random) -> list[list[str]]:
    keys = model.word_keys()
    ctxs: list[list[str]] = [["<s>"], [UNK]] + [[rng.choice(keys)] for _ in range(4)]
    if model.order == 3:
        ctxs += [["<s>", rng.choice(keys)]] + [[rng.choice(keys), rng.choice(keys)] for _ in range(6)]
    return ctxs


def check_sums(model: nextword.Model, ctxs: Sequence[Sequence[str]]) -> None:
    outcomes = model.word_keys() + [EOS, UNK]
    for ctx in ctxs:
        total = sum(model.prob_after(w, list(ctx)) for w in outcomes)
        assert total == pytest.approx(1.0, abs=1e-9), (ctx, total)


def brute_force(model: nextword.Model, ctx: Sequence[str], prefix: str, k: int) -> list[tuple[str, float]]:
    scored = [(-model.prob_after(w, list(ctx)), model.tie_rank(w), w) for w in model.word_keys() if w.startswith(prefix)]
    scored.sort()
    return [(w, -p) for p, _, w in scored[:k]]


def check_rankings(model: nextword.Model, ctxs: Sequence[Sequence[str]], prefixes: Sequence[str], ks: Sequence[int]) -> None:
    for ctx in ctxs:
        for prefix in prefixes:
            for k in ks:
                got = model.rank_after(list(ctx), prefix, k)
                want = brute_force(model, ctx, prefix, k)
                assert [p for _, p in got] == pytest.approx([p for _, p in want], rel=1e-12, abs=0), (ctx, prefix, k, got, want)
                # the same words, unless two of them tie to the last bits (docs/SEAMS.md "Ties")
                for (gw, gp), (ww, wp) in zip(got, want):
                    assert gw == ww or abs(gp - wp) <= 1e-12 * wp, (ctx, prefix, k, got, want)


@SETTINGS
@given(seed=st.integers(0, 10**6), n_messages=st.integers(3, 50), vocab_size=st.integers(2, len(WORDS)),
       smoothing=st.sampled_from(["jm", "kn"]), order=st.sampled_from([2, 3]), bits=st.sampled_from([2, 4]),
       pruned=st.booleans())
def test_quantised_models_sum_to_one_and_rank_like_brute_force(tmp_path_factory: pytest.TempPathFactory, seed: int,
                                                                n_messages: int, vocab_size: int, smoothing: str,
                                                                order: int, bits: int, pruned: bool) -> None:
    rng = random.Random(seed)
    msgs = random_messages(rng, n_messages, WORDS[:vocab_size])
    path = tmp_path_factory.mktemp("q") / "m.nwm"
    try:
        model = build_file(path, msgs, smoothing, order, bits, prune_seed=seed if pruned else None)
    except InvalidArgumentError as e:  # a corpus too small for the estimator (e.g. no KN discount) is not the point here
        pytest.skip(str(e))
    assert model.format_version == (1, 5) and model.info()["codec"] == {"name": "quant", "version": 1, "bits": bits}
    ctxs = contexts_of(model, rng)
    check_sums(model, ctxs)
    check_rankings(model, ctxs, ["", "b", "t", "ch", "zz"], [1, 2, 3, 5])
    # suggest goes through the same ranking (recasing aside): the brute force's words, in order
    for typed, ctx in (("", ["<s>"]), ("the ", ["the"] if order == 2 else ["<s>", "the"]), ("fix b", ["fix"] if order == 2 else ["<s>", "fix"])):
        got = [s.word.casefold() for s in model.suggest(typed, 3)]
        want = [w for w, _ in brute_force(model, ctx, typed.split(" ")[-1].casefold(), 3)]
        if got != want:  # allowed only for last-bit ties
            ps = [model.prob_after(w, ctx) for w in got]
            assert ps == pytest.approx([model.prob_after(w, ctx) for w in want], rel=1e-12)


def test_a_real_corpus_quantised_to_4_bits_is_exact_for_its_own_probabilities(tmp_path: Path) -> None:
    # a corpus with counts in the hundreds, so the codebook really merges values
    rng = random.Random(5)
    msgs = random_messages(rng, 1500, WORDS)
    for smoothing, order in (("kn", 3), ("jm", 2)):
        model = build_file(tmp_path / f"{smoothing}{order}.nwm", msgs, smoothing, order, 2, skyband=True)
        ctxs = contexts_of(model, rng)
        check_sums(model, ctxs)
        check_rankings(model, ctxs, ["", "b", "t"], [1, 3, 8])


@pytest.mark.parametrize("smoothing,order", [("jm", 2), ("kn", 2), ("jm", 3), ("kn", 3)])
def test_values_round_trip_through_the_file(tmp_path: Path, smoothing: str, order: int) -> None:
    # the decoded values are exactly the codec's quantisation of the fitted values, and
    # encoding the decoded values again gives the stored sections byte for byte
    msgs = random_messages(random.Random(order), 800, WORDS)
    path = tmp_path / "m.nwm"
    b = CountBuilder(order=order)
    b.add_texts(msgs)
    tables, counts = b.ngram_counts(min_count=1)
    fitted = (KneserNey() if smoothing == "kn" else JelinekMercer((0.9, 0.8)[: order - 1])).fit(counts)
    codec = QuantCodec(2)
    atomic_write(path, ngram_file(counts, tables, fitted, codec=codec))
    m = nextword.load(path, verify=True)
    stored = m.stored_ngrams()
    for lev, got in zip(fitted.levels[1:], stored.counts[1:]):
        assert sorted(got.tolist()) == sorted(codec.quantize(lev.value).tolist())
        assert len(np.unique(got)) <= 4 < len(np.unique(lev.value))
    arrays = read_model(path).arrays
    for tags, n in ((BIGRAM_TAGS, m.n_bigrams), *([(TRIGRAM_TAGS, m.header()["trigrams"])] if order == 3 else [])):
        view = codec.decode(str(path), arrays, tags, n)
        again = codec.encode(tags, view.all())
        for (tag, _, data), t in zip(again, tags):
            assert np.array_equal(np.asarray(data), arrays[t.decode()]), tag


def test_train_quantize_option_writes_format_1_5_and_exact_stays_default(tmp_path: Path) -> None:
    msgs = random_messages(random.Random(1), 300, WORDS)
    r = nextword.train_texts(msgs, tmp_path / "q.nwm", smoothing="kn", order=3, min_count=1, quantize=4)
    assert r.file_bytes == (tmp_path / "q.nwm").stat().st_size
    assert nextword.load(tmp_path / "q.nwm").format_version == (1, 5)
    nextword.train_texts(msgs, tmp_path / "e.nwm", smoothing="kn", order=3, min_count=1)
    assert nextword.load(tmp_path / "e.nwm").format_version == (1, 4)
    nextword.train_texts(msgs, tmp_path / "j.nwm", min_count=1)
    assert nextword.load(tmp_path / "j.nwm").format_version == (1, 0)
    with pytest.raises(InvalidArgumentError, match="quantize must be one of 2, 3, 4, 5, 6, 7, 8 bits"):
        nextword.train_texts(msgs, tmp_path / "x.nwm", quantize=9)


# -- the codebook ---------------------------------------------------------------------


@settings(max_examples=200, deadline=None)
@given(values=st.lists(st.integers(1, 10**6), min_size=1, max_size=300), bits=st.sampled_from(QUANT_BITS),
       method=st.sampled_from(["lloyd", "quantile"]))
def test_codebook_properties(values: list[int], bits: int, method: str) -> None:
    v = np.array(values, dtype=np.int64)
    cb = fit_codebook(v, bits, method=method)
    assert 1 <= len(cb) <= 1 << bits and bool(np.all(np.diff(cb) > 0)) and int(cb[0]) >= 1
    q = QuantCodec(bits, method=method).quantize(v)
    assert set(q.tolist()) <= set(cb.tolist())
    # 1 and 2 are kept (Kneser-Ney's discount classes), values >= 3 stay >= 3 and within the data's range
    assert np.array_equal(q[v < 3], v[v < 3]) and bool(np.all(q[v >= 3] >= 3))
    assert int(q.min()) >= int(v.min()) and int(q.max()) <= int(v.max())
    if len(np.unique(v)) <= 1 << bits:
        assert np.array_equal(q, v)  # few distinct values: lossless
    # monotone: a larger value never decodes smaller (the skybands' dominance relies on it)
    o = np.argsort(v, kind="stable")
    assert bool(np.all(np.diff(q[o]) >= 0))


def test_lloyd_never_loses_to_its_quantile_start() -> None:
    # Lloyd's iterations only lower the weighted squared error of the initial bins (common
    # practice: each step is a coordinate descent on the k-means objective)
    rng = np.random.default_rng(3)
    v = np.maximum(1, np.rint(rng.zipf(1.6, 20000))).astype(np.int64)
    v = v[v < 10**7]

    def err(q: np.ndarray) -> float:
        return float(np.sum(v * (np.log(q) - np.log(v)) ** 2))

    lloyd, quant = QuantCodec(4, method="lloyd").quantize(v), QuantCodec(4, method="quantile").quantize(v)
    assert err(lloyd) <= err(quant) * (1 + 1e-9)


# -- hostile files --------------------------------------------------------------------


def _sections(buf: bytes | bytearray) -> dict[bytes, tuple[int, int, int]]:
    n_sec = HEADER.unpack_from(buf, 0)[3]
    out = {}
    for i in range(n_sec):
        tag, code, off, length, _ = ENTRY.unpack_from(buf, HEADER.size + i * ENTRY.size)
        out[tag] = (code, off, length)
    return out


HOSTILE_MSGS = ["the cat sat on the mat"] * 40 + ["the dog sat. a cat ran", "Bo and Abe sat on a mat", "the mat is red"] * 4 \
    + ["the cat sat", "the cat ran"] * 9


@pytest.fixture(scope="module")
def q3_bytes(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    path = tmp_path_factory.mktemp("hostile") / "q3.nwm"
    nextword.train_texts(HOSTILE_MSGS, path, smoothing="kn", order=3, min_count=1, skyband_min=1, skyband_k=2, quantize=2)
    return path.read_bytes()


@pytest.fixture(scope="module")
def jm2_bytes(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    # a quantised JM bigram without dropped mass: answered by the JM bigram path, reading codes
    path = tmp_path_factory.mktemp("hostile") / "jm2.nwm"
    nextword.train_texts(HOSTILE_MSGS, path, min_count=1, skyband_min=1, skyband_k=2, quantize=3)
    return path.read_bytes()


def test_the_undamaged_quantised_files_answer_everything(q3_bytes: bytes, jm2_bytes: bytes, tmp_path: Path) -> None:
    # after "on the" the trigram knows "mat" (40 of 40); the bigram sees only "the": "cat" (58) before "mat" (44)
    for name, data, top in (("kn3", q3_bytes, "mat"), ("jm2", jm2_bytes, "cat")):
        (tmp_path / f"{name}.nwm").write_bytes(data)
        m = nextword.load(tmp_path / f"{name}.nwm", verify=True)
        assert m.format_version == (1, 5)
        assert m.rank_after(["on", "the"], "", 1)[0][0] == top
        _ask_everything(m)


def _patched(data: bytes, tag: bytes, at: int, raw: bytes) -> bytes:
    """The file with ``raw`` written at byte ``at`` of section ``tag`` (negative: from its end), every CRC fixed."""
    buf = bytearray(data)
    _, off, length = _sections(buf)[tag]
    at = at if at >= 0 else length + at
    assert 0 <= at and at + len(raw) <= length
    buf[off + at : off + at + len(raw)] = raw
    _recrc(buf)
    return bytes(buf)


@pytest.mark.parametrize("change,message", [
    (lambda d: _patched(d, b"BIGI", 0, (9).to_bytes(4, "little") * 2), "not a strictly increasing codebook"),
    (lambda d: _patched(d, b"TBGI", 0, (0).to_bytes(4, "little")), "not a strictly increasing codebook"),
    (lambda d: _with_meta(d, {"codec": {"name": "quant", "version": 1, "bits": 9}}), "codec .quant. with bits 9"),
    (lambda d: _with_meta(d, {"codec": {"name": "quant", "version": 2, "bits": 2}}), "version 2 belongs to format 1.6"),
    (lambda d: _with_meta(d, {"codec": {"name": "quant", "version": 3, "bits": 2}}), "version 3 is not supported"),
    (lambda d: _with_meta(d, {"codec": {"name": "quant", "version": 1, "bits": 4}}), "holds .* bytes, expected"),
    (lambda d: _with_meta(d, {"codec": {"name": "exact", "version": 1}}), "format 1.5 files do not use codec 'exact'"),
    (lambda d: _minor(d, 4), "format 1.4 files do not use codec 'quant'"),
])
def test_crafted_quantised_files_are_refused_by_name(q3_bytes: bytes, tmp_path: Path, change, message: str) -> None:
    bad = tmp_path / "bad.nwm"
    bad.write_bytes(change(q3_bytes))
    with pytest.raises(ModelFormatError, match=message):
        nextword.load(bad)


def test_a_code_past_the_codebook_is_refused(q3_bytes: bytes, tmp_path: Path) -> None:
    # shrink the trigram codebook to one entry: every stored code > 0 now points past it
    buf = bytearray(q3_bytes)
    secs = _sections(buf)
    code, off, length = secs[b"TBGI"]
    assert length >= 8
    n_sec = HEADER.unpack_from(buf, 0)[3]
    for i in range(n_sec):
        at = HEADER.size + i * ENTRY.size
        tag, c, o, ln, crc = ENTRY.unpack_from(buf, at)
        if tag == b"TBGI":
            ENTRY.pack_into(buf, at, tag, c, o, 4, crc)
    buf[off + 4 : off + length] = bytes(length - 4)
    _recrc(buf)
    bad = tmp_path / "bad.nwm"
    bad.write_bytes(bytes(buf))
    with pytest.raises(ModelFormatError, match="code past the codebook"):
        nextword.load(bad, verify=True)
    m = nextword.load(bad)  # a plain load reads codes lazily: every query that meets one refuses it
    with pytest.raises(ModelFormatError, match="past the codebook"):
        for hist in (["the", "cat"], ["<s>", "the"], ["on", "the"]):
            m.rank_after(hist, "", 3)
            m.prob_after("sat", hist)
            m.prob_after("mat", hist)


def _minor(data: bytes, minor: int) -> bytes:
    import struct

    buf = bytearray(data)
    struct.pack_into("<H", buf, 10, minor)
    _recrc(buf)
    return bytes(buf)


def _with_meta(data: bytes, change: dict[str, object]) -> bytes:
    """The file with META fields replaced, at the same length (the informational "generator" and "stats" absorb
    the difference: "stats" is emptied when the change makes META longer)."""
    import msgpack

    buf = bytearray(data)
    _, off, length = _sections(buf)[b"META"]
    meta = msgpack.unpackb(bytes(buf[off : off + length]), raw=False)
    meta.update(change)
    for stats in (meta.get("stats", {}), {}):
        meta["stats"] = stats
        for pad in range(0, 600):
            meta["generator"] = "x" * pad
            raw = msgpack.packb(meta, use_bin_type=True)
            if len(raw) == length:
                buf[off : off + length] = raw
                _recrc(buf)
                return bytes(buf)
    raise AssertionError("could not rewrite META in place")


@settings(max_examples=int(os.environ.get("NW_HOSTILE_EXAMPLES", "60")), deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=st.data(), which=st.sampled_from(["kn3", "jm2"]))
def test_crafted_quantised_files_raise_only_model_format_errors(q3_bytes: bytes, jm2_bytes: bytes,
                                                                tmp_path_factory: pytest.TempPathFactory,
                                                                data: st.DataObject, which: str) -> None:
    # random bytes in any section but the trie, every CRC fixed: the value sections more often (what this codec adds)
    mutate_and_ask(q3_bytes if which == "kn3" else jm2_bytes, data, tmp_path_factory, [b"CNTS", b"BIGI", b"TVAL", b"TBGI"])


# -- size budget and command line ---------------------------------------------------------


@pytest.mark.parametrize("smoothing,order", [("jm", 2), ("kn", 3)])
def test_write_to_size_and_prune_model_keep_the_quantised_codec(tmp_path: Path, smoothing: str, order: int) -> None:
    from nextword.prune import prune_model, write_to_size

    msgs = random_messages(random.Random(11), 2500, WORDS + [f"w{i}" for i in range(300)])
    b = CountBuilder(order=order)
    b.add_texts(msgs)
    tables, counts = b.ngram_counts(min_count=1)
    est = KneserNey() if smoothing == "kn" else JelinekMercer((0.9, 0.9)[: order - 1])
    full = tmp_path / "full.nwm"
    atomic_write(full, ngram_file(counts, tables, est.fit(counts), codec=QuantCodec(5)))
    budget = int(full.stat().st_size * 0.7)
    out = tmp_path / "small.nwm"
    write_to_size(counts, tables, est, budget, out, quantize=5)
    m = nextword.load(out, verify=True)
    assert m.file_size <= budget and m.format_version == (1, 5) and m.codec.meta()["bits"] == 5
    assert m.n_bigrams + int(m.header().get("trigrams", 0)) < nextword.load(full).n_bigrams + int(nextword.load(full).header().get("trigrams", 0))
    rng = random.Random(2)
    check_sums(m, contexts_of(m, rng))
    check_rankings(m, contexts_of(m, rng), ["", "w1", "b"], [1, 3])
    # pruning the quantised file again keeps its codec and width
    chunks, _ = prune_model(nextword.load(full), int(full.stat().st_size * 0.8), vocabulary=False)
    again = tmp_path / "again.nwm"
    atomic_write(again, chunks)
    m2 = nextword.load(again, verify=True)
    assert m2.format_version == (1, 5) and m2.codec.meta()["bits"] == 5
    check_sums(m2, contexts_of(m2, rng))


def test_a_new_lambda_is_refused_for_a_quantised_bigram(tmp_path: Path) -> None:
    from nextword.store import rewrite_model

    msgs = random_messages(random.Random(3), 200, WORDS)
    nextword.train_texts(msgs, tmp_path / "q.nwm", min_count=1, quantize=4)
    with pytest.raises(InvalidArgumentError, match="exact Jelinek-Mercer bigram model .* codec 'quant'"):
        rewrite_model(tmp_path / "q.nwm", tmp_path / "t.nwm", lam=0.5)


def _cli(*args: str) -> "subprocess.CompletedProcess[str]":
    import subprocess
    import sys

    return subprocess.run([sys.executable, "-m", "nextword", *args], capture_output=True, text=True, timeout=120)


def test_cli_train_quantize(tmp_path: Path) -> None:
    import json

    corpus = tmp_path / "c.txt"
    corpus.write_text("\n".join(random_messages(random.Random(4), 400, WORDS)) + "\n", encoding="utf-8")
    r = _cli("train", str(corpus), "-o", str(tmp_path / "q.nwm"), "--order", "3", "--smoothing", "kn", "--quantize", "5",
             "--min-count", "1", "--json")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["file_bytes"] == (tmp_path / "q.nwm").stat().st_size
    info = _cli("info", str(tmp_path / "q.nwm"), "--json")
    assert info.returncode == 0, info.stderr
    assert json.loads(info.stdout)["codec"] == {"name": "quant", "version": 1, "bits": 5}
    bad = _cli("train", str(corpus), "-o", str(tmp_path / "x.nwm"), "--quantize", "9")
    assert bad.returncode == 2 and bad.stderr.strip().splitlines()[-1].startswith("nextword: error:")
    assert "--quantize" in bad.stderr and "Traceback" not in bad.stderr


@pytest.mark.parametrize("spec, message", [
    ({"name": "quant", "version": 1, "bits": 5.0}, "bits 5.0"),
    ({"name": "quant", "version": 1.0, "bits": 5}, "version 1.0"),
    ({"name": "exact", "version": True}, "version True"),
])
def test_codec_numbers_must_be_integers(spec: dict, message: str) -> None:
    """A float or boolean where META needs an integer is refused by name (the C reader refuses them too)."""
    from nextword.codecs import codec_named
    from nextword.errors import ModelFormatError

    with pytest.raises(ModelFormatError, match=message):
        codec_named("m.nwm", spec)
