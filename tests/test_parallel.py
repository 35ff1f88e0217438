"""Partial counts merge exactly: chunks counted apart equal the whole counted at once."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
from nextword.counts import CountBuilder

WORDS = ["a", "ab", "B", "ba", "Abe", "don't", "x-ray", "ä", "7", "£", "The", "the"]


def _same(a: nextword.CountTables, b: nextword.CountTables) -> None:
    assert a.keys == b.keys and a.displays == b.displays and a.stats == b.stats
    for name in ("unigram", "pair_left", "pair_right", "pair_count"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name


@settings(max_examples=150, deadline=None)
@given(
    st.lists(st.lists(st.sampled_from(WORDS + [".", ",", "!"]), max_size=12).map(" ".join), min_size=1, max_size=20),
    st.lists(st.integers(0, 20), max_size=4),
    st.integers(1, 3),
)
def test_merge_of_partial_counts_equals_counting_the_concatenation(msgs: list[str], cuts: list[int], min_count: int) -> None:
    whole = CountBuilder()
    whole.add_texts(msgs)
    bounds = sorted({0, len(msgs), *(min(c, len(msgs)) for c in cuts)})
    merged = CountBuilder()
    for lo, hi in zip(bounds, bounds[1:]):
        part = CountBuilder()
        part.add_texts(msgs[lo:hi])
        merged.merge(part)
    if whole.word_tokens == 0:
        return
    try:
        want = whole.tables(min_count=min_count)
    except nextword.InvalidArgumentError:
        return
    _same(merged.tables(min_count=min_count), want)


def test_workers_write_the_same_file_byte_for_byte(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from pydoc_data.topics import topics  # real English shipped with CPython

    import nextword.counts

    lines = [ln for k in sorted(topics) for ln in topics[k].splitlines()]
    corpus = tmp_path / "c.txt"
    corpus.write_text("\n".join(lines) + "\n", encoding="utf-8")
    one, two, three = tmp_path / "one.nwm", tmp_path / "two.nwm", tmp_path / "three.nwm"
    nextword.train(corpus, one, min_count=1)
    monkeypatch.setattr(nextword.counts, "_BATCH_CHARS", 5000)  # many batches per worker
    nextword.train(corpus, two, min_count=1, workers=2)
    # workers under a small cap spill into the parent's directory; still the same bytes
    nextword.train(corpus, three, min_count=1, workers=2, memory_cap=1 << 18)
    assert one.read_bytes() == two.read_bytes() == three.read_bytes()


# every kind of character the text rules treat specially: line ends of all kinds,
# other white space, joiners, digits, number separators, symbols, soft punctuation,
# sentence ends, combining marks, capitals
_PIECES = ["a", "Ab", "b", "é", "e\u0301", "don't", "don’t", "x-ray", "7", "7:30", "3.5", "£", "+",
           ",", ".", "!", "?", "…", "(", '"', "'", "-", "\n", "\r", "\r\n", "\u2028", "\x0b", "\t",
           "\xa0", "\u3000", " ", "  ", "\x1c", "Σ", "ς", "_", ";", ":", ")", "”", "’", "“", "‘", "’s"]


@settings(max_examples=300, deadline=None)
@given(st.lists(st.lists(st.sampled_from(_PIECES), max_size=16).map("".join), max_size=12))
def test_counting_cuts_text_exactly_as_the_query_parser_does(msgs: list[str]) -> None:
    # Reference: nextword.text.sentences(), the parser the model uses at query time
    # (one message at a time, token by token). Training must cut text the same way.
    from collections import Counter

    from nextword.text import BOS, EOS, UNK, fold, sentences

    uni: Counter[str] = Counter()
    pairs: Counter[tuple[str, str]] = Counter()
    for m in msgs:
        for sent in sentences(m):
            toks = [BOS] + [UNK if w is None else fold(w) for w in sent] + [EOS]
            uni.update(toks[1:])
            pairs.update(zip(toks, toks[1:]))
    b = CountBuilder()
    b.add_texts(msgs)
    if not any(k not in (BOS, EOS, UNK) for k in uni):
        return
    t = b.tables(min_count=1, max_vocab=10_000)
    names = t.keys + [EOS, UNK, BOS]
    got_uni = {names[i]: int(c) for i, c in enumerate(t.unigram) if c}
    got_pairs = {(names[a], names[c]): int(n) for a, c, n in zip(t.pair_left, t.pair_right, t.pair_count)}
    assert got_uni == dict(uni)
    assert got_pairs == dict(pairs)
    assert t.stats["messages"] == len(msgs)
    assert t.stats["sentences"] == sum(len(sentences(m)) for m in msgs)


def test_spilling_under_a_memory_cap_changes_nothing(tmp_path: Path) -> None:
    from pydoc_data.topics import topics  # real English shipped with CPython

    lines = [ln for k in sorted(topics) for ln in topics[k].splitlines()]
    plain = CountBuilder()
    plain.add_texts(lines)
    capped = CountBuilder(memory_cap=1 << 16)
    capped.add_texts(lines)
    assert plain.spilled_runs == 0 and capped.spilled_runs > 3
    for mc in (1, 2):
        _same(capped.tables(min_count=mc), plain.tables(min_count=mc))
    # and merging a builder that spilled
    merged = CountBuilder()
    merged.merge(capped)
    _same(merged.tables(), plain.tables())


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc to read the peak RSS")
def test_memory_cap_bounds_peak_memory_of_training(tmp_path: Path) -> None:
    # Whole trainings (counting, vocabulary, pair reduction, build, write) in fresh
    # subprocesses on synthetic Zipf-like text with many distinct pairs (as the scale
    # target allows); peak RSS above the interpreter's own baseline, with and without
    # a 64 MB cap, in one process and with two worker processes.
    import os
    import subprocess
    import sys

    rng = np.random.default_rng(1)
    vocab = np.array([f"w{i}" for i in range(60000)])
    p = 1.0 / np.arange(1, 60001) ** 0.8
    p /= p.sum()
    corpus = tmp_path / "zipf.txt"
    with open(corpus, "w", encoding="utf-8") as f:
        for _ in range(30):
            toks = vocab[rng.choice(60000, size=100_000, p=p)]
            f.write("\n".join(" ".join(toks[i : i + 20]) for i in range(0, len(toks), 20)) + "\n")
    script = r"""
import resource, sys
import nextword
def status(field):
    return next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith(field))
base = status("VmRSS")
cap = None if sys.argv[1] == "none" else int(sys.argv[1])
nextword.train(sys.argv[3], sys.argv[3] + sys.argv[1] + sys.argv[2] + ".nwm", workers=int(sys.argv[2]),
               memory_cap=cap, max_vocab=3000)
# VmHWM: this process's own peak; RUSAGE_CHILDREN: the largest worker's peak
print(base, status("VmHWM"), resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)
"""
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    cap = 64 << 20
    out = {}
    for label, workers in (("none", 1), (str(cap), 1), (str(cap), 2)):
        r = subprocess.run([sys.executable, "-c", script, label, str(workers), str(corpus)],
                           capture_output=True, text=True, env=env, check=False)
        assert r.returncode == 0, r.stderr
        base, hwm, child = map(int, r.stdout.split())
        out[label, workers] = ((hwm - base) << 10, (child - base) << 10 if workers > 1 else 0)
    assert out["none", 1][0] > 2 * cap  # without the cap this input needs far more
    for workers in (1, 2):
        main_peak, worker_peak = out[str(cap), workers]
        assert main_peak < cap, out
        assert worker_peak < cap // 2, out  # each worker holds a third of the cap
    files = sorted(tmp_path.glob("*.nwm"))
    assert len(files) == 3 and len({f.read_bytes() for f in files}) == 1  # same model every way
