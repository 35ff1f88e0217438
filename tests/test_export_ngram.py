"""ARPA export of interpolated models of order 1..3, read back by an independent reader.

The reader below knows only the ARPA back-off format (from memory of its description:
``\\data\\``, ``ngram N=count`` lines, ``\\N-grams:`` sections of
``log10prob w1 .. wN [log10backoff]`` lines, ``\\end\\``; −99 stands for log 0) and the
standard back-off rule P(w | h) = P(h w) if listed, else backoff(h) · P(w | h′). It shares
no code with nextword/export.py. nltk cannot read ARPA files (nltk.lm has no ARPA
reader), so the outside checks are the format description above and, for Kneser-Ney,
the plain-dict oracle ``DictKneserNey`` (checked by hand and against nltk.lm in
tests/test_reference_kn.py).
"""

from __future__ import annotations

import gzip
import math
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
from nextword.errors import InvalidArgumentError
from nextword.estimators import Fitted, JelinekMercer, KneserNey
from nextword.export import arpa_lines_fitted, write_arpa, write_arpa_fitted
from nextword.ngrams import NgramCounts
from nextword.reference_kn import DictKneserNey
from nextword.text import BOS, EOS, UNK, fold, sentences

ROOT = Path(__file__).resolve().parent.parent
# written keys of the demo scenario (the Harbor Lane Bike Workshop); "café" checks UTF-8
KEYS = ["wheel", "chain", "spoke", "brake", "tyre", "café", "lane", "harbor", "pump", "bell"]
LOG_ZERO = -99.0


class Arpa:
    """A strict reader of the ARPA back-off format (from memory of its description)."""

    def __init__(self, text: str) -> None:
        assert text.endswith("\n"), "the file ends with a newline"
        lines = text.split("\n")[:-1]
        pos = 0

        def skip_blank() -> None:
            nonlocal pos
            while pos < len(lines) and not lines[pos].strip():
                pos += 1

        skip_blank()
        assert lines[pos] == "\\data\\", lines[pos]
        pos += 1
        self.counts: dict[int, int] = {}
        while pos < len(lines) and lines[pos].startswith("ngram "):
            n, k = lines[pos][len("ngram "):].split("=")
            assert int(n) == len(self.counts) + 1, "orders are listed 1, 2, .. in turn"
            self.counts[int(n)] = int(k)
            pos += 1
        self.order = len(self.counts)
        assert self.order >= 1
        self.grams: dict[int, dict[tuple[str, ...], tuple[float, float | None]]] = {}
        for n in range(1, self.order + 1):
            skip_blank()
            assert lines[pos] == f"\\{n}-grams:", lines[pos]
            pos += 1
            table: dict[tuple[str, ...], tuple[float, float | None]] = {}
            while pos < len(lines) and lines[pos].strip() and not lines[pos].startswith("\\"):
                fields = lines[pos].split()
                assert len(fields) in ((n + 1, n + 2) if n < self.order else (n + 1,)), lines[pos]
                words = tuple(fields[1 : n + 1])
                assert words not in table, f"{words} listed twice"
                table[words] = (float(fields[0]), float(fields[n + 1]) if len(fields) == n + 2 else None)
                pos += 1
            assert len(table) == self.counts[n], f"order {n}: header says {self.counts[n]}, section has {len(table)}"
            self.grams[n] = table
        skip_blank()
        assert lines[pos] == "\\end\\", lines[pos]
        assert all(not ln.strip() for ln in lines[pos + 1:]), "nothing after \\end\\"
        # the back-off weight of a context lives on its own entry: every context is listed
        for n in range(2, self.order + 1):
            for words in self.grams[n]:
                assert words[:-1] in self.grams[n - 1], f"context of {words} is not listed"

    def prob(self, h: tuple[str, ...], w: str) -> float:
        """P(w | h) by the back-off rule (common practice), from the longest usable context."""
        h = h[len(h) - (self.order - 1):] if self.order > 1 else ()
        log = 0.0
        while True:
            entry = self.grams[len(h) + 1].get((*h, w))
            if entry is not None:
                return 0.0 if entry[0] <= LOG_ZERO else 10 ** (log + entry[0])
            assert h, f"{w} is not a listed unigram"
            ctx = self.grams[len(h)].get(h)
            if ctx is not None and ctx[1] is not None:
                log += ctx[1]
            h = h[1:]


def _names(n_words: int) -> list[str]:
    return [*KEYS[:n_words], EOS, UNK, BOS]


def _read(path: Path) -> Arpa:
    data = path.read_bytes()
    if path.name.endswith(".gz"):
        assert data[:2] == b"\x1f\x8b"
        data = gzip.decompress(data)
    return Arpa(data.decode("utf-8"))


def _check_reading(fitted: Fitted, arpa: Arpa, names: list[str], contexts: list[tuple[int, ...]]) -> None:
    n_out = fitted.n_outcomes
    index = {k: i for i, k in enumerate(names)}
    # every listed n-gram: the full interpolated probability
    for n, table in arpa.grams.items():
        for words, (logp, _) in table.items():
            if words[-1] == BOS:
                assert logp == LOG_ZERO  # never predicted (the format's convention)
                continue
            ids = tuple(index[t] for t in words)
            assert arpa.prob(words[:-1], words[-1]) == pytest.approx(fitted.prob(ids[-1], ids[:-1]), rel=1e-9)
    # every context, listed or not: each outcome reads back as the model's, and they sum to 1
    for ctx in contexts:
        h = tuple(names[i] for i in ctx)
        read = [arpa.prob(h, names[w]) for w in range(n_out)]
        for w in range(n_out):
            assert read[w] == pytest.approx(fitted.prob(w, ctx), rel=1e-9), (h, names[w])
        assert math.fsum(read) == pytest.approx(1.0, abs=1e-8)


def _contexts(fitted: Fitted, extra: list[tuple[int, ...]]) -> list[tuple[int, ...]]:
    """The empty context, every stored context of every order, and ``extra`` (unseen ones)."""
    out: set[tuple[int, ...]] = {()}
    for lev in fitted.levels[1:]:
        out.update(tuple(int(x) for x in row) for row in lev.ctx)
    return sorted(out | set(extra))


sentence_lists = st.integers(1, len(KEYS)).flatmap(
    lambda n: st.tuples(
        st.just(n),
        st.lists(st.lists(st.integers(0, n + 1), max_size=8), min_size=1, max_size=12),  # ids n+1 = <unk>
    )
)


@settings(max_examples=120, deadline=None)
@given(
    sentence_lists,
    st.integers(1, 3),
    st.sampled_from(["jm", "kn", "kn-fixed"]),
    st.lists(st.floats(0.0, 0.999), min_size=2, max_size=2),
    st.booleans(),
    st.data(),
)
def test_every_probability_reads_back(
    corpus: tuple[int, list[list[int]]], order: int, method: str, lams: list[float], gz: bool, data: st.DataObject
) -> None:
    n_words, sents = corpus
    counts = NgramCounts.from_sentences(sents, n_words, order)
    est = JelinekMercer(lams) if method == "jm" else KneserNey(discounts=[0.3, 0.5, 0.7][:order] if method == "kn-fixed" else None)
    fitted = est.fit(counts)
    names = _names(n_words)
    extra = [tuple(data.draw(st.lists(st.integers(0, n_words + 1), min_size=1, max_size=2))) for _ in range(4)]
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / ("m.arpa.gz" if gz else "m.arpa")
        written = write_arpa_fitted(fitted, KEYS[:n_words], path)
        arpa = _read(path)
    # header counts: every outcome + <s>, then exactly the stored n-grams (the counting scheme
    # counts every prefix of a counted n-gram, so no context has to be added)
    assert arpa.order == order
    assert written == [arpa.counts[n] for n in range(1, order + 1)]
    assert arpa.counts[1] == n_words + 3 and set(arpa.grams[1]) == {(k,) for k in names}
    for n in range(2, order + 1):
        assert arpa.counts[n] == len(fitted.levels[n - 1].grams)
    assert arpa.grams[1][(BOS,)][0] == LOG_ZERO
    _check_reading(fitted, arpa, names, _contexts(fitted, extra))


def test_missing_context_is_added_with_its_implied_probability(tmp_path: Path) -> None:
    # A hand-made table (as after pruning): the trigram (<s> wheel chain) is kept but its
    # context, the bigram (<s> wheel), is not. The writer must list (<s> wheel) — ARPA keeps
    # a context's back-off weight on its own entry — with P(wheel | <s>) as the model gives it.
    n = 3  # wheel chain spoke; </s> 3, <unk> 4, <s> 5
    full = NgramCounts.from_sentences([[0, 1], [1, 0], [2, 0, 1]], n, 3)
    g2, c2 = full.grams[1], full.counts[1]
    keep = ~((g2[:, 0] == 5) & (g2[:, 1] == 0))
    assert int((~keep).sum()) == 1
    counts = NgramCounts(n, (full.grams[0], g2[keep], full.grams[2]), (full.counts[0], c2[keep], full.counts[2]))
    names = _names(n)
    for est in (JelinekMercer([0.6, 0.8]), KneserNey()):
        fitted = est.fit(counts)
        path = tmp_path / f"{est.name}.arpa"
        write_arpa_fitted(fitted, KEYS[:n], path)
        arpa = _read(path)  # checks that every context is listed
        assert arpa.counts[2] == len(counts.grams[1]) + 1
        logp, bow = arpa.grams[2][(BOS, "wheel")]
        assert 10**logp == pytest.approx(fitted.prob(0, (5,)), rel=1e-9)
        j = fitted.levels[2].find_context((5, 0))
        assert bow is not None and 10**bow == pytest.approx(fitted.gamma(3, j), rel=1e-9)
        _check_reading(fitted, arpa, names, _contexts(fitted, [(5,), (0, 1), (3, 2)]))


@settings(max_examples=25, deadline=None)
@given(st.lists(st.lists(st.sampled_from(["Fix", "the", "wheel", "chain", "spoke", "7", ".", "brake"]), max_size=10).map(" ".join), min_size=1, max_size=15),
       st.integers(1, 3))
def test_kneser_ney_file_equals_the_dict_oracle(msgs: list[str], order: int) -> None:
    # outside check: the reading equals DictKneserNey (checked by hand and against nltk.lm)
    oracle = DictKneserNey(msgs, order=order, min_count=1)
    n = len(oracle.vocab)
    index = {w: i for i, w in enumerate(oracle.vocab)}
    index[EOS], index[UNK], index[BOS] = n, n + 1, n + 2
    sents = [[index.get(UNK if t is None else fold(t), n + 1) for t in s] for m in msgs for s in sentences(m)]
    fitted = KneserNey().fit(NgramCounts.from_sentences(sents, n, order))
    arpa = Arpa("\n".join(arpa_lines_fitted(fitted, oracle.vocab)) + "\n")
    words = oracle.vocab[:4]
    for ctx in [(), (BOS,), *[(w,) for w in words], *[(a, b) for a in [BOS, *words[:2]] for b in words[:3]]]:
        for w in oracle.outcomes:
            assert arpa.prob(ctx, w) == pytest.approx(oracle.prob(w, list(ctx)), rel=1e-9)


def test_bigram_model_and_fitted_writer_agree(tmp_path: Path) -> None:
    # the Model's writer and the estimator writer on one corpus (invented demo messages,
    # every word kept): the two files read back alike for every history and outcome
    lines = (ROOT / "examples" / "data" / "demo_messages.txt").read_text(encoding="utf-8").splitlines()[:300]
    nextword.train_texts(lines, tmp_path / "m.nwm", min_count=1)
    model = nextword.load(tmp_path / "m.nwm")
    write_arpa(model, tmp_path / "model.arpa")
    old = _read(tmp_path / "model.arpa")
    keys = [k for (k,) in old.grams[1] if k not in (EOS, UNK, BOS)]
    index = {k: i for i, k in enumerate(keys)}
    n = len(keys)
    sents = [[n + 1 if t is None else index[fold(t)] for t in s] for m in lines for s in sentences(m)]
    fitted = JelinekMercer([model.lam]).fit(NgramCounts.from_sentences(sents, n, 2))
    write_arpa_fitted(fitted, keys, tmp_path / "fitted.arpa")
    new = _read(tmp_path / "fitted.arpa")
    assert new.counts == old.counts
    outcomes = [*keys, EOS, UNK]
    rng = np.random.default_rng(7)
    for v in [BOS, UNK, *rng.choice(keys, 40, replace=False).tolist()]:
        for w in outcomes:
            assert new.prob((v,), w) == pytest.approx(old.prob((v,), w), rel=1e-9, abs=1e-300)


def test_write_refuses_its_input_and_bad_keys(tmp_path: Path) -> None:
    fitted = KneserNey().fit(NgramCounts.from_sentences([[0, 1, 2]], 3, 3))
    src = tmp_path / "corpus.txt"
    src.write_text("wheel chain spoke\n")
    with pytest.raises(InvalidArgumentError, match="corpus.txt"):
        write_arpa_fitted(fitted, KEYS[:3], src, inputs=[src])
    assert src.read_text() == "wheel chain spoke\n"
    out = tmp_path / "m.arpa"
    for bad in (KEYS[:2], ["wheel", "chain", "wheel"], ["wheel", "two words", "x"], ["wheel", "", "x"], ["wheel", "<s>", "x"]):
        with pytest.raises(InvalidArgumentError):
            write_arpa_fitted(fitted, bad, out)
    assert not out.exists() and list(tmp_path.iterdir()) == [src]


def test_model_writer_refuses_the_model_file(tmp_path: Path) -> None:
    # writing the export over the model it reads destroyed the model before this check
    nextword.train_texts(["fix the wheel", "fix the chain"], tmp_path / "m.nwm", min_count=1)
    before = (tmp_path / "m.nwm").read_bytes()
    model = nextword.load(tmp_path / "m.nwm")
    with pytest.raises(InvalidArgumentError, match="m.nwm"):
        write_arpa(model, tmp_path / "m.nwm")
    assert (tmp_path / "m.nwm").read_bytes() == before


def test_gzip_output_is_streamed_in_pieces(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # many small pieces through one compressor: still one valid gzip member of the same text
    import nextword.export as export

    fitted = JelinekMercer([0.7, 0.5]).fit(NgramCounts.from_sentences([[0, 1, 2, 3], [2, 1, 0], [4, 4, 1]], 5, 3))
    write_arpa_fitted(fitted, KEYS[:5], tmp_path / "whole.arpa")
    monkeypatch.setattr(export, "CHUNK_CHARS", 16)
    write_arpa_fitted(fitted, KEYS[:5], tmp_path / "a.arpa.gz")
    write_arpa_fitted(fitted, KEYS[:5], tmp_path / "b.arpa.gz")
    data = (tmp_path / "a.arpa.gz").read_bytes()
    assert data == (tmp_path / "b.arpa.gz").read_bytes()  # no timestamp in the header
    assert gzip.decompress(data) == (tmp_path / "whole.arpa").read_bytes()
    Arpa(gzip.decompress(data).decode("utf-8"))
