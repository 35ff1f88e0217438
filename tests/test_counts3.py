"""Word triples counted in the streaming pass (``CountBuilder(order=3)``), checked from outside the builder.

- A hand-computable corpus, the triples listed in the comments, and the same triples
  from ``nltk.util.ngrams`` (a general-purpose n-gram walker) over ``<s> w1 .. wk </s>``.
- By hypothesis, for random messages (words, capitals, numbers, symbols, soft
  punctuation, sentence ends, every kind of line break): the builder's counts of every
  order equal ``NgramCounts.from_sentences`` over id sentences built here from
  ``nextword.text.sentences()`` (the query-time parser) and the vocabulary rule as
  documented in nextword/counts.py (count >= min_count, the max_vocab most frequent,
  ids by count descending, ties by key in code-point order), with the one-key and the
  two-key (``np.lexsort``) sort of triples alike.
- One process, two worker processes, a memory cap that spills, a merge of two builders
  and Dask give identical arrays; order 2 is what it was.
"""

from __future__ import annotations

from collections import Counter
from pathlib import Path
from unittest import mock

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
import nextword.counts as counts_mod
from nextword.counts import CountBuilder, CountTables, count_in_processes
from nextword.errors import InvalidArgumentError
from nextword.ngrams import NgramCounts
from nextword.text import fold, sentences


def _reference(msgs: list[str], min_count: int, max_vocab: int, order: int) -> tuple[list[str], NgramCounts]:
    """Vocabulary and counts built without the builder: text.sentences + the vocabulary rule."""
    parsed = [s for m in msgs for s in sentences(m)]
    key_counts = Counter(fold(w) for s in parsed for w in s if w is not None)
    ranked = sorted((k for k, c in key_counts.items() if c >= min_count), key=lambda k: (-key_counts[k], k))
    vocab = ranked[:max_vocab]
    ids = {k: i for i, k in enumerate(vocab)}
    n = len(vocab)
    unk = n + 1
    id_sents = [[unk if w is None else ids.get(fold(w), unk) for w in s] for s in parsed]
    return vocab, NgramCounts.from_sentences(id_sents, n, order)


def _assert_same_counts(got: NgramCounts, want: NgramCounts) -> None:
    assert got.n_words == want.n_words and got.order == want.order
    for m in range(want.order):
        assert got.grams[m].dtype == np.int64 and got.counts[m].dtype == np.int64
        assert np.array_equal(got.grams[m], want.grams[m]), f"level {m + 1}"
        assert np.array_equal(got.counts[m], want.counts[m]), f"level {m + 1}"


def _assert_same_tables(a: CountTables, b: CountTables) -> None:
    assert a.keys == b.keys and a.displays == b.displays and a.stats == b.stats
    for name in ("unigram", "pair_left", "pair_right", "pair_count"):
        x, y = getattr(a, name), getattr(b, name)
        assert x.dtype == y.dtype and np.array_equal(x, y), name


def _topic_lines() -> list[str]:
    from pydoc_data.topics import topics  # real English shipped with CPython

    return [ln for k in sorted(topics) for ln in topics[k].splitlines()]


def test_hand_computed_triples() -> None:
    # "See you at the Mill. see you at 7:30!" -> two sentences (case folded, 7:30 -> <unk>):
    #   <s> see you at the mill </s>   triples: (<s> see you) (see you at) (you at the) (at the mill) (the mill </s>)
    #   <s> see you at <unk> </s>      triples: (<s> see you) (see you at) (you at <unk>) (at <unk> </s>)
    # so (<s> see you) and (see you at) count 2, the other five 1; nothing spans the sentence start.
    b = CountBuilder(order=3)
    b.add_text("See you at the Mill. see you at 7:30!")
    tables, ng = b.ngram_counts(min_count=1)
    names = tables.keys + ["</s>", "<unk>", "<s>"]
    got = {tuple(names[i] for i in g): int(c) for g, c in zip(ng.grams[2], ng.counts[2])}
    assert got == {
        ("<s>", "see", "you"): 2, ("see", "you", "at"): 2, ("you", "at", "the"): 1, ("at", "the", "mill"): 1,
        ("the", "mill", "</s>"): 1, ("you", "at", "<unk>"): 1, ("at", "<unk>", "</s>"): 1,
    }
    # the same from nltk's n-gram walker over the padded sentences
    from nltk.util import ngrams

    padded = [["<s>", "see", "you", "at", "the", "mill", "</s>"], ["<s>", "see", "you", "at", "<unk>", "</s>"]]
    assert got == dict(Counter(g for s in padded for g in ngrams(s, 3)))
    # levels 1 and 2 are the tables' own counts
    assert np.array_equal(ng.grams[0][:, 0], np.flatnonzero(tables.unigram))
    assert np.array_equal(ng.counts[0], tables.unigram[tables.unigram > 0])
    assert np.array_equal(ng.grams[1], np.column_stack((tables.pair_left, tables.pair_right)))
    assert ng.counts[1] is tables.pair_count


def test_unknown_words_merge_triples() -> None:
    # min_count 2 keeps "the" (3) and "bike" (2); "red", "blue", "old" become <unk>, so
    # "the red bike", "the blue bike", "the old bike" are one triple (the <unk> bike), count 3
    # (a run of out-of-vocabulary words is not collapsed, only numbers and symbols are).
    b = CountBuilder(order=3)
    b.add_texts(["the red bike", "the blue bike", "the old"])
    tables, ng = b.ngram_counts(min_count=2)
    assert tables.keys == ["the", "bike"]
    names = tables.keys + ["</s>", "<unk>", "<s>"]
    got = {tuple(names[i] for i in g): int(c) for g, c in zip(ng.grams[2], ng.counts[2])}
    assert got == {("<s>", "the", "<unk>"): 3, ("the", "<unk>", "bike"): 2, ("<unk>", "bike", "</s>"): 2,
                   ("the", "<unk>", "</s>"): 1}


# every kind of character the text rules treat specially (as in tests/test_parallel.py)
_PIECES = ["a", "Ab", "b", "B", "é", "e\u0301", "don't", "x-ray", "7", "7:30", "3.5", "£", "+", "the", "The",
           ",", ".", "!", "?", "…", "(", '"', "'", "-", "\n", "\r\n", "\u2028", "\x0b", "\t", "\xa0", " ", "  ",
           "Σ", "ς", "_", ";", ")", "”", "’", "’s"]


@settings(max_examples=250, deadline=None)
@given(
    st.lists(st.lists(st.sampled_from(_PIECES + [" "] * 6), max_size=24).map("".join), max_size=10),
    st.integers(1, 3),
    st.integers(1, 8),
    st.booleans(),
    st.lists(st.integers(0, 10), max_size=3),
)
def test_builder_counts_equal_the_reference_counter(
    msgs: list[str], min_count: int, max_vocab: int, packed: bool, cuts: list[int]
) -> None:
    vocab, want = _reference(msgs, min_count, max_vocab, 3)
    # packed=False forces every triple sort onto the two-key path (as with > 2^21 ids)
    limit = counts_mod._PACK3_LIMIT if packed else 3
    with mock.patch.object(counts_mod, "_PACK3_LIMIT", limit):
        whole = CountBuilder(order=3)
        whole.add_texts(msgs)
        tables, got = whole.ngram_counts(min_count=min_count, max_vocab=max_vocab)
        assert tables.keys == vocab
        _assert_same_counts(got, want)
        # counted in pieces and merged: the same
        bounds = sorted({0, len(msgs), *(min(c, len(msgs)) for c in cuts)})
        merged = CountBuilder(order=3)
        for lo, hi in zip(bounds, bounds[1:]):
            part = CountBuilder(order=3)
            part.add_texts(msgs[lo:hi])
            merged.merge(part)
        tables_m, got_m = merged.ngram_counts(min_count=min_count, max_vocab=max_vocab)
        _assert_same_tables(tables_m, tables)
        _assert_same_counts(got_m, want)
    # order 2 counts the same words and pairs, and nothing more
    two = CountBuilder()
    two.add_texts(msgs)
    tables_2, got_2 = two.ngram_counts(min_count=min_count, max_vocab=max_vocab)
    _assert_same_tables(tables_2, tables)
    _, want_2 = _reference(msgs, min_count, max_vocab, 2)
    _assert_same_counts(got_2, want_2)


def test_every_way_of_counting_gives_the_same_arrays(monkeypatch: pytest.MonkeyPatch) -> None:
    lines = _topic_lines()
    plain = CountBuilder(order=3)
    plain.add_texts(lines)
    tables, want = plain.ngram_counts(min_count=1)
    assert len(want.grams[2]) > 5 * 4096  # several slices and buckets of 4096 under the cap below
    # spilling under a small cap: the triples are spilled and reduced in buckets too
    capped = CountBuilder(memory_cap=1 << 16, order=3)
    capped.add_texts(lines)
    assert capped._triples is not None and len(capped._triples.runs) > 3
    # two builders merged (one of them spilled)
    half = len(lines) // 2
    first, second = CountBuilder(order=3), CountBuilder(memory_cap=1 << 16, order=3)
    first.add_texts(lines[:half])
    second.add_texts(lines[half:])
    first.merge(second)
    # worker processes, with many batches each, without and with a cap
    monkeypatch.setattr(counts_mod, "_BATCH_CHARS", 5000)
    workers = count_in_processes(iter(lines), 2, order=3)
    workers_capped = count_in_processes(iter(lines), 2, order=3, memory_cap=1 << 18)
    assert workers_capped.spilled_runs > 0
    for other in (capped, first, workers, workers_capped):
        for mc in (1, 2):
            t, got = other.ngram_counts(min_count=mc)
            t_ref, ref = plain.ngram_counts(min_count=mc)
            _assert_same_tables(t, t_ref)
            _assert_same_counts(got, ref)
            for a, b in zip(got.grams + got.counts, ref.grams + ref.counts):
                assert a.tobytes() == b.tobytes()
    # and order 2 through the same paths equals order 2 in one process
    two = CountBuilder()
    two.add_texts(lines)
    _assert_same_tables(count_in_processes(iter(lines), 2, memory_cap=1 << 18).tables(min_count=1), two.tables(min_count=1))
    _assert_same_tables(two.tables(min_count=1), tables)


def test_dask_counts_triples_like_one_process(tmp_path: Path) -> None:
    pytest.importorskip("dask", reason="the dask extra is not installed")
    from nextword.distributed import count_on_dask

    lines = _topic_lines()
    paths = []
    for i in range(3):
        p = tmp_path / f"part{i}.txt"
        p.write_text("\n".join(lines[i::3]) + "\n", encoding="utf-8")
        paths.append(p)
    one = CountBuilder(order=3)
    for p in paths:
        one.add_texts(p.read_text(encoding="utf-8").splitlines())
    tables, want = one.ngram_counts(min_count=1)
    got_tables, got = count_on_dask(paths, order=3).ngram_counts(min_count=1)  # local scheduler
    _assert_same_tables(got_tables, tables)
    _assert_same_counts(got, want)


def test_order_2_model_file_is_unchanged_by_an_order_3_builder(tmp_path: Path) -> None:
    # the tables an order-3 builder gives are the order-2 tables: the same model file
    from nextword.store import write_model

    lines = _topic_lines()[:4000]
    files = []
    for order in (2, 3):
        b = CountBuilder(order=order)
        b.add_texts(lines)
        path = tmp_path / f"o{order}.nwm"
        write_model(b.tables(min_count=1), path, lam=0.9, skyband_k=8, skyband_min=64)
        files.append(path.read_bytes())
    assert files[0] == files[1]
    nextword.train_texts(lines, tmp_path / "t.nwm", min_count=1)
    assert (tmp_path / "t.nwm").read_bytes() == files[0]


@pytest.mark.parametrize("order", [0, 1, 4, True, 2.0, "3", None])
def test_bad_order_is_refused(order: object) -> None:
    with pytest.raises(InvalidArgumentError, match=repr(order).replace("(", r"\(").replace(")", r"\)")):
        CountBuilder(order=order)  # type: ignore[arg-type]


def test_merging_different_orders_is_refused() -> None:
    a, b = CountBuilder(order=3), CountBuilder(order=2)
    with pytest.raises(InvalidArgumentError, match="order 2 into a builder of order 3"):
        a.merge(b)


@pytest.mark.parametrize("workers", [0, -1, True])
def test_bad_worker_count_is_refused(workers: object) -> None:
    with pytest.raises(InvalidArgumentError, match="workers"):
        count_in_processes(iter(["a b"]), workers)  # type: ignore[arg-type]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 6), st.integers(0, 6), st.integers(0, 6)), max_size=8), st.booleans())
def test_ngram_tables_accept_exactly_the_strictly_sorted_rows(rows: list[tuple[int, int, int]], huge: bool) -> None:
    # Reference: Python's own tuple order (lexicographic); the check packs rows into one
    # key when the ids allow and compares differences otherwise (huge vocabulary).
    n_words = (1 << 21) if huge else 5
    grams = np.asarray(rows, dtype=np.int64).reshape(-1, 3)
    ok = all(a < b for a, b in zip(rows, rows[1:]))
    make = lambda: NgramCounts(  # noqa: E731
        n_words, (np.zeros((0, 1), np.int64), np.zeros((0, 2), np.int64), grams),
        (np.zeros(0, np.int64), np.zeros(0, np.int64), np.ones(len(rows), np.int64)),
    )
    if ok:
        assert make().order == 3
    else:
        with pytest.raises(InvalidArgumentError, match="not sorted and distinct"):
            make()


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc to read the peak RSS")
def test_memory_cap_bounds_the_counting_pass_of_order_3(tmp_path: Path) -> None:
    # Fresh subprocesses count 1M words of Zipf-like text (60,000 word types) with order 3;
    # the peak RSS of the counting pass above the baseline stays under a 32 MB cap, while
    # without a cap it is more than twice that; the final counts are the same either way.
    # (The cap bounds the n-gram counts; the spellings and the batch being cut cost a
    # floor of their own, about 20 MB here for order 2 as for order 3.)
    import subprocess
    import sys

    script = r"""
import hashlib, sys
import numpy as np
from nextword.counts import CountBuilder
def status(field):
    return next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith(field))
rng = np.random.default_rng(1)
vocab = np.array([f"w{i}" for i in range(60000)])
p = 1.0 / np.arange(1, 60001) ** 0.8
p /= p.sum()
lines = []
for _ in range(10):  # in slices, so making the text sets no high-water mark of its own
    toks = vocab[rng.choice(60000, size=100_000, p=p)]
    lines += [" ".join(toks[i : i + 20]) for i in range(0, len(toks), 20)]
del toks
base = status("VmRSS")
b = CountBuilder(memory_cap=None if sys.argv[1] == "none" else int(sys.argv[1]), order=3)
b.add_texts(lines)
b.word_tokens  # flushes the last batch
peak = status("VmHWM") - base
_, ng = b.ngram_counts(max_vocab=3000)
digest = hashlib.sha256(b"".join(a.tobytes() for a in ng.grams + ng.counts)).hexdigest()
print(peak << 10, b.spilled_runs, digest)
"""
    import os

    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    cap = 32 << 20
    out = {}
    for label in ("none", str(cap)):
        r = subprocess.run([sys.executable, "-c", script, label], capture_output=True, text=True, env=env, check=False)
        assert r.returncode == 0, r.stderr
        peak, runs, digest = r.stdout.split()
        out[label] = (int(peak), int(runs), digest)
    assert out["none"][0] > 2 * cap and out["none"][1] == 0, out
    assert out[str(cap)][0] < cap and out[str(cap)][1] > 0, out
    assert out["none"][2] == out[str(cap)][2]
