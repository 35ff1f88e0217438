"""`nextword export` of model files of every estimator and order, read back independently.

The ARPA files are read by the strict reader of tests/test_export_ngram.py (``Arpa``: the
format and the back-off rule from memory of the format's description; it shares no code
with nextword/export.py). Checks: every listed n-gram's probability and, for every stored
context and some unseen ones, every outcome read back by the back-off rule equal the
model's own ``prob_after`` (relative 1e-9: log values carry 10 decimals), and every
context sums to 1. For Jelinek-Mercer the model's probabilities are themselves checked
against the dict oracles elsewhere (``DictBigram``, tests/test_model_trigram.py's
``DictJMTrigram``); here the trigram file is also compared with ``DictJMTrigram`` directly.
Corpora: CPython's ``pydoc_data.topics`` (real English shipped with Python) and random
corpora over a small word list.
"""

from __future__ import annotations

import json
import math
import random
import subprocess
import sys
import os
from pathlib import Path

import pytest
from hypothesis import given, settings, HealthCheck
from hypothesis import strategies as st

import nextword
from nextword.errors import InvalidArgumentError
from nextword.export import fitted_from_model, write_arpa
from nextword.store import rewrite_model
from nextword.text import BOS, EOS, UNK
from test_export_ngram import Arpa, _read
from test_model_kn import WORDS, random_messages
from test_model_trigram import DictJMTrigram

ROOT = Path(__file__).resolve().parent.parent
KINDS = [("jm", 2), ("jm", 3), ("kn", 2), ("kn", 3)]


def _topics_lines(n: int) -> list[str]:
    from pydoc_data.topics import topics

    return [ln for k in sorted(topics)[:n] for ln in topics[k].splitlines() if ln.strip()]


@pytest.fixture(scope="module")
def models(tmp_path_factory: pytest.TempPathFactory) -> dict[tuple[str, int], Path]:
    lines = _topics_lines(12)
    tmp = tmp_path_factory.mktemp("exp")
    out = {}
    for smoothing, order in KINDS:
        path = tmp / f"{smoothing}{order}.nwm"
        kw: dict[str, object] = {"lam": 0.8, "lam3": 0.6} if smoothing == "jm" and order == 3 else {}
        nextword.train_texts(lines, path, order=order, smoothing=smoothing, min_count=2, **kw)  # type: ignore[arg-type]
        out[smoothing, order] = path
    return out


def _contexts(model: nextword.Model, rng: random.Random, n: int) -> list[tuple[str, ...]]:
    """Stored contexts of every order (a sample), the empty context, and unseen ones."""
    counts = model.stored_ngrams()
    names = [*model.word_keys(), EOS, UNK, BOS]
    out: set[tuple[str, ...]] = {(BOS,), (UNK,)}
    for m in range(2, model.order + 1):
        ctx = sorted({tuple(int(x) for x in row[:-1]) for row in counts.grams[m - 1]})
        for c in rng.sample(ctx, min(n, len(ctx))):
            out.add(tuple(names[i] for i in c))
    words = model.word_keys()
    for _ in range(n // 2):  # unseen combinations
        out.add(tuple(rng.choice([*words, BOS, UNK]) for _ in range(model.order - 1)))
    return sorted(out)


def _check_file(model: nextword.Model, arpa: Arpa, contexts: list[tuple[str, ...]]) -> None:
    outcomes = [*model.word_keys(), EOS, UNK]
    # header: every outcome + <s>, then the stored n-grams (every prefix is itself stored)
    counts = model.stored_ngrams()
    assert arpa.order == model.order
    assert arpa.counts[1] == model.n_words + 3
    for m in range(2, model.order + 1):
        assert arpa.counts[m] == len(counts.grams[m - 1])
    for n, table in arpa.grams.items():
        for words, (logp, _) in table.items():
            if words[-1] == BOS:
                assert logp <= -99
                continue
            if n == 1:  # P1: c(w)/N for Jelinek-Mercer; Kneser-Ney's floor is checked through the contexts below
                if model.estimator == "jm":
                    assert 10**logp == pytest.approx(model.unigram_count(words[0]) / model.total, rel=1e-9)
                continue
            hist = [None if t == BOS else t for t in words[:-1]]
            assert arpa.prob(words[:-1], words[-1]) == pytest.approx(model.prob_after(words[-1], hist), rel=1e-9)
    for h in contexts:
        hist = [None if t == BOS else t for t in h]
        read = [arpa.prob(h, w) for w in outcomes]
        for w, p in zip(outcomes, read):
            assert p == pytest.approx(model.prob_after(w, hist), rel=1e-9), (h, w)
        assert math.fsum(read) == pytest.approx(1.0, abs=1e-9), h


@pytest.mark.parametrize("kind", KINDS, ids=[f"{s}{o}" for s, o in KINDS])
def test_cli_export_reads_back_as_the_model(models: dict[tuple[str, int], Path], tmp_path: Path, kind: tuple[str, int]) -> None:
    path = models[kind]
    out = tmp_path / "m.arpa.gz"
    r = subprocess.run([sys.executable, "-m", "nextword", "export", str(path), "-o", str(out), "--json"],
                       capture_output=True, text=True, env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert r.returncode == 0, r.stderr
    data = json.loads(r.stdout)
    model = nextword.load(path)
    assert (data["estimator"], data["order"]) == kind
    arpa = _read(out)
    names = ["unigrams", "bigrams", "trigrams"]
    assert [data[names[m - 1]] for m in range(1, model.order + 1)] == [arpa.counts[m] for m in range(1, model.order + 1)]
    _check_file(model, arpa, _contexts(model, random.Random(5), 25))


def test_jm_trigram_file_equals_the_dict_oracle(models: dict[tuple[str, int], Path], tmp_path: Path) -> None:
    # outside check: the reading equals DictJMTrigram (plain dicts over the raw text, λ2 = 0.8, λ3 = 0.6)
    model = nextword.load(models["jm", 3])
    write_arpa(model, tmp_path / "m.arpa")
    arpa = _read(tmp_path / "m.arpa")
    oracle = DictJMTrigram(_topics_lines(12), lam2=0.8, lam3=0.6, min_count=2)
    rng = random.Random(3)
    words = oracle.vocab
    for ctx in [[BOS], [BOS, "the"], *[[rng.choice(words), rng.choice(words)] for _ in range(10)], ["the", "following"]]:
        h = tuple(ctx)
        for w in rng.sample(oracle.outcomes, 60) + [EOS, UNK]:
            assert arpa.prob(h, w) == pytest.approx(oracle.prob(w, ctx), rel=1e-9), (h, w)


def test_lambda_override_and_buckets(models: dict[tuple[str, int], Path], tmp_path: Path) -> None:
    # --lam replaces every order's λ, as a query-time override does; a bigram file's λ buckets
    # give each history its own back-off weight
    m3 = nextword.load(models["jm", 3], lam=0.5)
    write_arpa(nextword.load(models["jm", 3]), tmp_path / "o.arpa", lam=0.5)
    _check_file(m3, _read(tmp_path / "o.arpa"), _contexts(m3, random.Random(1), 10))
    bucketed = tmp_path / "b.nwm"
    rewrite_model(models["jm", 2], bucketed, lam=0.7, buckets={"bounds": [3, 40], "lambdas": [0.2, 0.6, 0.9]})
    mb = nextword.load(bucketed)
    write_arpa(mb, tmp_path / "b.arpa")
    arpa = _read(tmp_path / "b.arpa")
    _check_file(mb, arpa, _contexts(mb, random.Random(2), 20))
    # by hand: a history seen c(v) ≥ 40 times backs off with log10(1 − 0.9), one seen < 3 times with log10(1 − 0.2)
    the = arpa.grams[1][("the",)][1]
    assert mb.history_count("the") >= 40 and the == pytest.approx(math.log10(0.1), abs=1e-10)
    rare = next(w for w in mb.word_keys() if 0 < mb.history_count(w) < 3)
    assert arpa.grams[1][(rare,)][1] == pytest.approx(math.log10(0.8), abs=1e-10)


def test_kneser_ney_refuses_a_lambda(models: dict[tuple[str, int], Path], tmp_path: Path) -> None:
    with pytest.raises(InvalidArgumentError, match="Kneser-Ney"):
        fitted_from_model(nextword.load(models["kn", 3]), lam=0.5)
    r = subprocess.run([sys.executable, "-m", "nextword", "export", str(models["kn", 2]), "-o", str(tmp_path / "x.arpa"),
                        "--lam", "0.5"], capture_output=True, text=True, env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "Kneser-Ney" in r.stderr
    assert not (tmp_path / "x.arpa").exists()


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 10**6), n_messages=st.integers(2, 40), vocab_size=st.integers(2, len(WORDS)),
       kind=st.sampled_from(KINDS), min_count=st.sampled_from([1, 2]))
def test_random_corpora_every_context_sums_to_one(tmp_path_factory: pytest.TempPathFactory, seed: int, n_messages: int,
                                                  vocab_size: int, kind: tuple[str, int], min_count: int) -> None:
    rng = random.Random(seed)
    messages = random_messages(rng, n_messages, WORDS[:vocab_size])
    tmp = tmp_path_factory.mktemp("r")
    smoothing, order = kind
    try:
        nextword.train_texts(messages, tmp / "m.nwm", order=order, smoothing=smoothing, min_count=min_count)
    except (nextword.InputDataError, InvalidArgumentError):
        return  # nothing left after the vocabulary rule
    model = nextword.load(tmp / "m.nwm")
    write_arpa(model, tmp / "m.arpa")
    arpa = _read(tmp / "m.arpa")
    names = [*model.word_keys(), BOS, UNK, "zebra"]
    ctxs = {tuple(rng.choice(names) for _ in range(order - 1)) for _ in range(8)} | set(_contexts(model, rng, 30))
    ctxs = {tuple(UNK if t == "zebra" else t for t in c) for c in ctxs}
    _check_file(model, arpa, sorted(ctxs))


def test_pruned_bigram_file(models: dict[tuple[str, int], Path], tmp_path: Path) -> None:
    # a pruned file stores c(v) as the sum of its kept pairs (format 1.2): the export's contexts use them
    full = nextword.load(models["jm", 2])
    r = subprocess.run([sys.executable, "-m", "nextword", "prune", str(models["jm", 2]), "-o", str(tmp_path / "p.nwm"),
                        "--max-size", str(int(full.file_size * 0.6))], capture_output=True, text=True,
                       env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert r.returncode == 0, r.stderr
    pruned = nextword.load(tmp_path / "p.nwm")
    assert pruned.n_bigrams < full.n_bigrams and pruned.format_version == (1, 2)
    write_arpa(pruned, tmp_path / "p.arpa")
    _check_file(pruned, _read(tmp_path / "p.arpa"), _contexts(pruned, random.Random(4), 30))


@pytest.mark.parametrize("kind", KINDS, ids=[f"{s}{o}" for s, o in KINDS])
def test_fitted_from_model_scores_exactly_as_the_model(models: dict[tuple[str, int], Path], kind: tuple[str, int]) -> None:
    # the same operations in the same order (estimators' α + γ·lower; the model's scorer): equal to the last bit
    model = nextword.load(models[kind])
    fitted = fitted_from_model(model)
    names = [*model.word_keys(), EOS, UNK, BOS]
    index = {k: i for i, k in enumerate(names)}
    for h in _contexts(model, random.Random(9), 15):
        ids = tuple(index[t] for t in h)
        hist = [None if t == BOS else t for t in h]
        for w in range(model.n_words + 2):
            assert fitted.prob(w, ids) == model.prob_after(names[w], hist), (h, names[w])
    levels = model.stored_levels()
    assert [len(lev.grams) for lev in levels] == [len(g) for g in model.stored_ngrams().grams]
