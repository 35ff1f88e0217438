"""Kneser-Ney models (order 2 here; order 3 in tests/test_model_trigram.py) against the dict oracle.

The oracle is :class:`nextword.reference_kn.DictKneserNey`: interpolated modified
Kneser-Ney written out with plain dicts (Chen & Goodman 1998, section 3), checked by hand
and against nltk in tests/test_reference_kn.py. It scores every word; the engine reads a
memory-mapped file and looks at a bounded candidate set. Both use the same text rules and
vocabulary rule, so every probability must agree (the engine evaluates the same float
operations in the same order, so in practice they are equal to the last bit; the checks
allow a relative 1e-12) and every ranking must be the same list of keys.
"""

from __future__ import annotations

import math
import random
from collections.abc import Sequence
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword.errors import InvalidArgumentError
from nextword.reference_kn import DictKneserNey, Discounts
from nextword.text import BOS, fold, parse_typed, sentences

SETTINGS = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])

WORDS = ["bike", "bell", "brake", "chain", "crank", "the", "a", "lane", "harbor", "tube", "tire", "fix", "is", "to"]


def oracle_like(model: nextword.Model, messages: list[str], **kw: object) -> DictKneserNey:
    """The oracle over the same messages, with the discounts the file records.

    The file records Chen & Goodman's discounts unless an order had to change them (a
    stated note, see store._discount_checks); the oracle then uses the same ones. Without
    a note they must be exactly the oracle's own estimate.
    """
    o = DictKneserNey(messages, order=model.order, **kw)  # type: ignore[arg-type]
    for m, d in enumerate(model.discounts, 1):
        own = o.discounts[m]
        assert own is not None
        if str(m) not in model.discount_notes:
            assert [own.d1, own.d2, own.d3] == d, (m, own, d)
        else:
            assert "1-D1 < 2-D2 < 3-D3" in model.discount_notes[str(m)] or m in o.fallbacks
            o.discounts[m] = Discounts(*d)
    for m, why in o.fallbacks.items():  # the oracle's stated fallbacks are recorded too
        assert why in model.discount_notes[str(m)]
    return o


def check_probabilities(model: nextword.Model, oracle: DictKneserNey, contexts: Sequence[Sequence[str]]) -> None:
    for ctx in contexts:
        h = oracle._context(list(ctx))
        total = 0.0
        for w in oracle.outcomes:
            got, want = model.prob_after(w, list(ctx)), oracle.prob_key(w, h)
            assert got == pytest.approx(want, rel=1e-12, abs=0), (ctx, w, got, want)
            total += got
        assert total == pytest.approx(1.0, rel=1e-9), ctx  # a distribution over words, </s>, <unk>


def check_rankings(model: nextword.Model, oracle: DictKneserNey, contexts: Sequence[Sequence[str]], prefixes: Sequence[str], ks: Sequence[int]) -> None:
    for ctx in contexts:
        for p in prefixes:
            for k in ks:
                got = model.rank_after(list(ctx), p, k)
                want = oracle.rank(list(ctx), p, k)
                assert [w for w, _ in got] == [w for w, _ in want], (ctx, p, k, got, want)
                for (_, a), (_, b) in zip(got, want):
                    assert a == pytest.approx(b, rel=1e-12, abs=0)


def check_suggest(model: nextword.Model, oracle: DictKneserNey, typed: Sequence[str], k: int) -> None:
    """``suggest`` ranks like the oracle after the context the text rules give (casing aside)."""
    for t in typed:
        ctx = parse_typed(t)
        got = model.suggest(t, k)
        want = oracle.rank(list(ctx.history), ctx.prefix, k)
        assert [fold(s.word) for s in got] == [w for w, _ in want], (t, got, want)
        for s, (_, p) in zip(got, want):
            assert s.prob == pytest.approx(p, rel=1e-12, abs=0)


def random_messages(rng: random.Random, n_messages: int, vocab: Sequence[str]) -> list[str]:
    out = []
    for _ in range(n_messages):
        words = [rng.choice(vocab) for _ in range(rng.randint(1, 9))]
        if rng.random() < 0.3:
            words[0] = words[0].capitalize()
        if rng.random() < 0.1:
            words.insert(rng.randint(0, len(words)), "42")  # a number: the unknown symbol
        sep = rng.choice([". ", " ", "! "])
        out.append(" ".join(words[: len(words) // 2]) + sep + " ".join(words[len(words) // 2 :]))
    return out


def contexts_for(rng: random.Random, vocab: Sequence[str], order: int) -> list[list[str]]:
    ctxs: list[list[str]] = [[BOS], ["<unk>"], ["zebra"], [BOS, rng.choice(vocab)]]
    for _ in range(6):
        ctxs.append([rng.choice([*vocab, "zebra", "<unk>"]) for _ in range(order - 1)])
    return ctxs


@SETTINGS
@given(seed=st.integers(0, 10**6), n_messages=st.integers(3, 60), vocab_size=st.integers(2, len(WORDS)),
       min_count=st.sampled_from([1, 2]), small_bands=st.booleans())
def test_random_corpora_equal_the_oracle(tmp_path_factory: pytest.TempPathFactory, seed: int, n_messages: int,
                                         vocab_size: int, min_count: int, small_bands: bool) -> None:
    rng = random.Random(seed)
    vocab = WORDS[:vocab_size]
    messages = random_messages(rng, n_messages, vocab)
    path = tmp_path_factory.mktemp("kn") / "m.nwm"
    # small_bands: skybands on rows of more than 2 successors, so the stored-band path runs
    extra = {"skyband_min": 2, "skyband_k": 3} if small_bands else {}
    try:
        nextword.train_texts(messages, path, smoothing="kn", min_count=min_count, **extra)  # type: ignore[arg-type]
    except nextword.InputDataError:
        return  # no word reached min_count
    except InvalidArgumentError as e:
        assert "vocabulary is empty" in str(e)
        return
    model = nextword.load(path, verify=True)
    assert (model.estimator, model.order, model.format_version) == ("kn", 2, (1, 4))
    oracle = oracle_like(model, messages, min_count=min_count)
    ctxs = contexts_for(rng, vocab, 2)
    check_probabilities(model, oracle, ctxs)
    prefixes = ["", "b", "br", "t", "th", "x", "B"]
    check_rankings(model, oracle, ctxs, prefixes, [1, 2, 3, 5, 20])
    typed = ["", "The b", "the ", "fix the b", "Bike. T", "42 b", "a BR", "zebra "]
    check_suggest(model, oracle, typed, 3)


# A corpus whose continuation counts make two floors equal in real numbers but one last-bit
# step apart in floats: "tube" has continuation count 1, "tire" 3, and Chen & Goodman's
# estimate gives 1 − D₁ = 3 − D₃ = 2/3 here (D₁ = 1/3, D₃ = 7/3), computed as
# 0.6666666666666663 and 0.6666666666666665. After <unk> both score γ·floor, which rounds
# to one float. First found by test_random_corpora_equal_the_oracle (seed 884).
NEAR_TIE = [
    "fix! lane", "fix 42 bike. a crank bike", "chain harbor lane bike! tire bell tire chain", "The a",
    "harbor a lane 42", "bike fix tire lane! bell fix brake tube brake", "! is", "lane. chain brake",
]


@pytest.mark.parametrize("order", [2, 3])
def test_floors_one_bit_apart_tie_to_the_larger_floor(tmp_path: Path, order: int) -> None:
    path = tmp_path / "m.nwm"
    nextword.train_texts(NEAR_TIE, path, smoothing="kn", order=order, min_count=1)
    model = nextword.load(path, verify=True)
    oracle = oracle_like(model, NEAR_TIE, min_count=1)
    ctxs = [[BOS], ["<unk>"], ["fix"], ["bike"], ["lane"], ["tire"], ["a", "lane"], ["bike", "fix"]]
    if order == 3:  # the trigram model's floors differ otherwise; its rankings still equal the oracle's
        check_rankings(model, oracle, ctxs, ["", "t", "b", "ti", "tu"], [1, 2, 3, 5, 20])
        return
    # the case itself (from the oracle, not the engine): different floors, one score
    f_tube, f_tire = oracle.prob_key("tube", ()), oracle.prob_key("tire", ())
    assert f_tube > f_tire and math.nextafter(f_tire, 1.0) == f_tube
    h = oracle._context(["<unk>"])
    assert oracle.prob_key("tube", h) == oracle.prob_key("tire", h)
    # the tie goes to the larger floor ("tube", the smaller id), though "tire" has the smaller key
    assert model.tie_rank("tube") < model.tie_rank("tire")
    want = oracle.rank(["<unk>"], "t", 2)
    assert [w for w, _ in want] == ["the", "tube"]
    assert [w for w, _ in model.rank_after(["<unk>"], "t", 2)] == ["the", "tube"]
    assert [fold(s.word) for s in model.suggest("42 t", 2)] == ["the", "tube"]
    # and every other query on this corpus agrees with the oracle
    check_rankings(model, oracle, ctxs, ["", "t", "b", "ti", "tu"], [1, 2, 3, 5, 20])


@pytest.fixture(scope="module")
def pydoc_lines() -> list[str]:
    from pydoc_data.topics import topics  # real English shipped with CPython (as tests/test_reference.py)

    return "\n".join(topics[k] for k in sorted(topics)).splitlines()[:2500]


@pytest.fixture(scope="module")
def pydoc_kn(pydoc_lines: list[str], tmp_path_factory: pytest.TempPathFactory) -> tuple[nextword.Model, DictKneserNey]:
    path = tmp_path_factory.mktemp("pydoc") / "kn2.nwm"
    nextword.train_texts(pydoc_lines, path, smoothing="kn")
    model = nextword.load(path, verify=True)
    return model, oracle_like(model, pydoc_lines)


def test_real_text_probabilities_and_rankings_equal_the_oracle(pydoc_kn: tuple[nextword.Model, DictKneserNey]) -> None:
    model, oracle = pydoc_kn
    rng = random.Random(7)
    common = [w for w, _ in zip(oracle.vocab, range(200))]
    ctxs = [[BOS], ["the"], ["of"], ["is"], ["<unk>"], ["zyzzyva"]] + [[rng.choice(common)] for _ in range(6)]
    check_probabilities(model, oracle, ctxs[:6])
    prefixes = ["", "t", "th", "a", "pr", "s", "re", "co", "x", "in"]
    check_rankings(model, oracle, ctxs, prefixes, [1, 3, 8, 12])
    check_suggest(model, oracle, ["The ", "the m", "Return the v", "If x is ", "In the c", "A"], 5)


def test_real_text_perplexity_equals_the_oracle(pydoc_kn: tuple[nextword.Model, DictKneserNey], pydoc_lines: list[str]) -> None:
    model, oracle = pydoc_kn
    from pydoc_data.topics import topics

    held = "\n".join(topics[k] for k in sorted(topics)).splitlines()[2500:2800]
    logs, n = 0.0, 0
    for line in held:
        for sent in sentences(line):
            toks = ["<unk>" if t is None else t for t in sent] + ["</s>"]
            ctx = [BOS]
            for t in toks:
                logs += math.log(oracle.prob(t, ctx))
                n += 1
                ctx.append(t)
    assert model.perplexity(held) == pytest.approx(math.exp(-logs / n), rel=1e-12)


def test_the_default_jm_bigram_file_is_unchanged(tmp_path: Path, pydoc_lines: list[str]) -> None:
    # the explicit defaults write the same bytes as before the new estimators (format 1.0)
    a, b = tmp_path / "a.nwm", tmp_path / "b.nwm"
    nextword.train_texts(pydoc_lines[:400], a)
    nextword.train_texts(pydoc_lines[:400], b, smoothing="jm", order=2, lam=0.9)
    assert a.read_bytes() == b.read_bytes()
    m = nextword.load(a)
    assert (m.estimator, m.order, m.format_version) == ("jm", 2, (1, 0))


def test_bad_orders_smoothings_and_lam_with_kn_are_refused(tmp_path: Path) -> None:
    msgs = ["fix the bike", "fix the bell"]
    with pytest.raises(InvalidArgumentError, match="order must be one of 2, 3, got 4"):
        nextword.train_texts(msgs, tmp_path / "x.nwm", order=4)
    with pytest.raises(InvalidArgumentError, match="smoothing must be one of jm, kn, got 'wb'"):
        nextword.train_texts(msgs, tmp_path / "x.nwm", smoothing="wb")
    with pytest.raises(InvalidArgumentError, match="lam=0.5 given with Kneser-Ney"):
        nextword.train_texts(msgs, tmp_path / "x.nwm", smoothing="kn", lam=0.5)
    nextword.train_texts(msgs, tmp_path / "k.nwm", smoothing="kn", min_count=1)
    model = nextword.load(tmp_path / "k.nwm")
    with pytest.raises(InvalidArgumentError, match="lam=0.3 given for a Kneser-Ney model"):
        model.suggest("fix ", lam=0.3)
    with pytest.raises(InvalidArgumentError, match="Kneser-Ney model"):
        nextword.load(tmp_path / "k.nwm", lam=0.3)


def test_a_tiny_corpus_falls_back_with_the_stated_reason(tmp_path: Path) -> None:
    # two messages cannot give n1..n4 > 0: Chen & Goodman's estimate is undefined, so the
    # fit falls back (reference_kn.fit_discounts) and the file says why
    msgs = ["fix the bike", "fix the bell"]
    nextword.train_texts(msgs, tmp_path / "k.nwm", smoothing="kn", min_count=1)
    model = nextword.load(tmp_path / "k.nwm", verify=True)
    oracle = oracle_like(model, msgs, min_count=1)
    assert set(oracle.fallbacks) == {1, 2}
    assert "too few counts for three discounts" in model.discount_notes["2"]
    check_probabilities(model, oracle, [[BOS], ["fix"], ["the"], ["zebra"]])
    info = model.info()
    assert info["estimator"] == "kn" and info["order"] == 2 and info["discount_notes"] == model.discount_notes


def test_a_discount_order_that_breaks_the_skyband_argument_is_replaced() -> None:
    from nextword.store import _discount_checks

    # bigram level: 1-D1 = 0.2, 2-D2 = 0.1 (not increasing): one discount D1 for every count
    fixed, notes = _discount_checks([[0.5, 1.0, 1.5], [0.8, 1.9, 2.0]], 2)
    assert fixed == [[0.5, 1.0, 1.5], [0.8, 0.8, 0.8]] and set(notes) == {"2"}
    # the unigram level may break it (ids rank by its floor value itself): left as fitted
    fixed, notes = _discount_checks([[0.2, 1.7, 2.5], [0.5, 1.0, 1.5]], 2)
    assert fixed == [[0.2, 1.7, 2.5], [0.5, 1.0, 1.5]] and notes == {}


def _cli(*args: str) -> "subprocess.CompletedProcess[str]":
    import subprocess
    import sys

    return subprocess.run([sys.executable, "-m", "nextword", *args], capture_output=True, text=True, timeout=120)


def test_cli_train_and_info_for_the_new_models(tmp_path: Path) -> None:
    corpus = tmp_path / "c.txt"
    corpus.write_text("fix the bike\nfix the bell\nthe bike is fixed\nthe bell rings\n" * 5, encoding="utf-8")
    out = tmp_path / "k.nwm"
    r = _cli("train", str(corpus), "-o", str(out), "--order", "3", "--smoothing", "kn", "--min-count", "1")
    assert r.returncode == 0, r.stderr
    info = _cli("info", str(out), "--json", "--verify")
    import json

    data = json.loads(info.stdout)
    assert (data["estimator"], data["order"], data["format_version"]) == ("kn", 3, "1.4")
    assert len(data["discounts"]) == 3 and "too few counts" in data["discount_notes"]["3"]
    text = _cli("info", str(out)).stdout
    assert "estimator" in text and "discount_notes" in text
    assert _cli("suggest", str(out), "fix the b").stdout.count("bike") == 1
    for args, needle in [
        (["--order", "4"], "invalid choice: 4"),
        (["--smoothing", "wb"], "invalid choice: 'wb'"),
        (["--smoothing", "kn", "--lam", "0.5"], "lam=0.5 given with Kneser-Ney"),
        (["--order", "3", "--smoothing", "kn", "--max-size", "100"], "below the smallest possible model"),
        (["--lam3", "0.5"], "--lam3 0.5 needs --order 3 --smoothing jm"),
    ]:
        r = _cli("train", str(corpus), "-o", str(tmp_path / "x.nwm"), *args)
        lines = r.stderr.strip().splitlines()
        assert r.returncode == 2 and len(lines) == 1 and lines[0].startswith("nextword: error:") and needle in lines[0], r.stderr
    r = _cli("suggest", str(out), "--lam", "0.3", "fix ")
    assert r.returncode == 2 and "Kneser-Ney model" in r.stderr
    jm3 = tmp_path / "j.nwm"
    assert _cli("train", str(corpus), "-o", str(jm3), "--order", "3", "--lam3", "0.7", "--min-count", "1").returncode == 0
    assert nextword.load(jm3).stored_lam3 == 0.7


def test_worker_processes_write_the_same_kn_file(tmp_path: Path, pydoc_lines: list[str]) -> None:
    # the messages are kept by the reading process, so counting in workers changes nothing
    corpus = tmp_path / "c.txt"
    corpus.write_text("\n".join(pydoc_lines[:800]) + "\n", encoding="utf-8")
    one, two = tmp_path / "one.nwm", tmp_path / "two.nwm"
    nextword.train(corpus, one, smoothing="kn", order=3, workers=1)
    nextword.train(corpus, two, smoothing="kn", order=3, workers=2)
    assert one.read_bytes() == two.read_bytes()
    assert nextword.load(one, verify=True).order == 3
