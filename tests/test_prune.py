"""Pruning to a size budget: the budget holds, unigrams stay, the model stays a distribution."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
from nextword.counts import CountBuilder, CountTables
from nextword.prune import drop_words, parse_size, prune_tables, prune_to_size, tables_from_model, vocabulary_bytes, word_values
from nextword.store import atomic_write, build_sections, encode_sections


@pytest.fixture(scope="module")
def lines() -> list[str]:
    from pydoc_data.topics import topics  # real English shipped with CPython

    return [ln for k in sorted(topics)[:40] for ln in topics[k].splitlines() if ln.strip()]


def test_parse_size() -> None:
    assert parse_size("4MB") == 4_000_000 and parse_size("1.5MiB") == 1_572_864 and parse_size("250000") == 250_000
    with pytest.raises(nextword.InvalidArgumentError, match="cannot read a size"):
        parse_size("four")


@pytest.mark.parametrize("vocabulary", [False, True])
@pytest.mark.parametrize("rule", ["entropy", "count"])
def test_pruned_model_fits_keeps_unigrams_and_sums_to_one(lines: list[str], tmp_path: Path, rule: str, vocabulary: bool) -> None:
    b = CountBuilder()
    b.add_texts(lines)
    tables = b.tables(min_count=1)
    full = tmp_path / "full.nwm"
    nextword.store.write_model(tables, full, lam=0.9)
    floor = vocabulary_bytes(tables)
    budget = floor + (full.stat().st_size - floor) // 2  # half of the pairs' bytes
    pruned_tables, chunks, info = prune_to_size(tables, budget, rule=rule, lam=0.9, vocabulary=vocabulary)  # type: ignore[arg-type]
    out = tmp_path / "pruned.nwm"
    atomic_write(out, chunks)
    assert out.stat().st_size <= budget and (info["removed"] > 0 or info["words_removed"] > 0)
    m = nextword.load(out, verify=True)
    assert m.format_version == (1, 2)
    unig = np.asarray(m._unig)
    if not vocabulary:
        assert np.array_equal(unig, tables.unigram)  # no unigram is ever removed
    else:  # kept words keep their counts; the dropped words' mass is <unk>'s now
        n = m.n_words
        assert info["words_removed"] == tables.n_words - n
        kept = [tables.keys.index(nextword.text.fold(w)) for w, _ in m.words()]
        assert np.array_equal(unig[:n], tables.unigram[kept])
        assert unig[n] == tables.unigram[-2] and unig.sum() == tables.unigram.sum()
        if info["removed"] == 0 and info["words_removed"] > 0:  # no budget left unused: one more word overflows
            from nextword.prune import drop_words, prune_tables, word_values

            wv = word_values(tables, rule, 0.9)  # type: ignore[arg-type]
            mask = np.isin(np.asarray(tables.keys), [nextword.text.fold(w) for w, _ in m.words()])
            best_dropped = np.flatnonzero(~mask)[np.argmax(wv[~mask])]
            mask[best_dropped] = True
            bigger = drop_words(tables, mask)
            size = sum(len(c) for c in nextword.store.encode_sections(
                nextword.store.build_sections(prune_tables(bigger, np.ones(len(bigger.pair_count), dtype=bool)), lam=0.9), minor=2))
            assert size > budget
    vocab = [w for w, _ in m.words()] + ["</s>", "<unk>"]
    for prev in [None, "the", "is", "a", "<unk>", "object"]:
        assert math.fsum(m.prob(w, prev) for w in vocab) == pytest.approx(1.0, abs=1e-12)
    # exact ranking still holds on pruned rows: compare with scoring every word by prob()
    for prev in [None, "the", "a", "is"]:
        for prefix in ["", "t", "ex"]:
            want = sorted(
                ((m.prob(w, prev), nextword.text.fold(w)) for w, _ in m.words() if nextword.text.fold(w).startswith(prefix)),
                key=lambda t: (-t[0], t[1]),
            )[:5]
            assert [(k, p) for k, p in m.rank_ids(prev, prefix, 5)] == [(k, p) for p, k in want]
    # an existing model prunes to the same result as its counts
    again, _, _ = prune_to_size(tables_from_model(nextword.load(full)), budget, rule=rule, lam=0.9, vocabulary=vocabulary)  # type: ignore[arg-type]
    assert np.array_equal(again.pair_count, pruned_tables.pair_count)


def test_budget_below_the_vocabulary_is_a_clear_error(lines: list[str]) -> None:
    b = CountBuilder()
    b.add_texts(lines[:200])
    with pytest.raises(nextword.InvalidArgumentError, match="below the vocabulary alone"):
        prune_to_size(b.tables(min_count=1), 1000, vocabulary=False)


def test_train_with_max_size(lines: list[str], tmp_path: Path) -> None:
    import os
    import subprocess
    import sys

    corpus = tmp_path / "c.txt"
    corpus.write_text("\n".join(lines) + "\n")
    full = tmp_path / "full.nwm"
    nextword.train(corpus, full, min_count=1)
    b = CountBuilder()
    b.add_texts(lines)
    floor = vocabulary_bytes(b.tables(min_count=1))
    budget = floor + (full.stat().st_size - floor) // 3
    out = tmp_path / "small.nwm"
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    r = subprocess.run([sys.executable, "-m", "nextword", "train", str(corpus), "-o", str(out), "--min-count", "1",
                        "--max-size", str(budget)], capture_output=True, text=True, env=env)
    assert r.returncode == 0, r.stderr
    assert out.stat().st_size <= budget
    assert nextword.load(out, verify=True).n_words <= nextword.load(full).n_words


# -- the fast size search against the plain one -----------------------------------------------------
#
# The reference below is the search as first written (the code before the size search kept
# its builds and scores): every score from one flat expansion of the (pair × distinct count)
# terms, orders from stable argsorts, and a fresh build for every size it needs. The fast
# search must choose the same words and pairs and write the same bytes (common practice for
# an optimisation: the straightforward version is the oracle).


def _plain_entropy_scores(tables: CountTables, lam: float) -> np.ndarray:
    n_hist = tables.n_words + 3
    left = np.asarray(tables.pair_left, dtype=np.int64)
    c = np.asarray(tables.pair_count, dtype=np.float64)
    if len(c) == 0:
        return np.zeros(0)
    total = float(tables.unigram.sum())
    row_sum = np.bincount(left, weights=c, minlength=n_hist)
    cv = row_sum[left]
    u = tables.unigram[np.asarray(tables.pair_right, dtype=np.int64)] / total
    p = lam * c / cv + (1.0 - lam) * u
    rows = np.concatenate([[0], np.cumsum(np.bincount(left, minlength=n_hist))])
    radix = int(c.max()) + 1
    combos, pair_combo = np.unique(left * radix + c.astype(np.int64), return_inverse=True)
    combo_row = combos // radix
    combo_c = (combos % radix).astype(np.float64)
    combo_cv = row_sum[combo_row]
    rest = combo_cv - combo_c
    with np.errstate(divide="ignore", invalid="ignore"):
        combo_t = np.where(rest > 0, lam * combo_c / (combo_cv * np.where(rest > 0, rest, 1.0)), 0.0)
    lens = (rows[1:] - rows[:-1])[combo_row]
    ends = np.cumsum(lens)
    idx = np.arange(int(ends[-1])) + np.repeat(rows[combo_row] - (ends - lens), lens)
    vals = p[idx] * np.log1p(c[idx] * np.repeat(combo_t, lens) / p[idx])
    combo_f = np.add.reduceat(vals, np.concatenate([[0], ends[:-1]]))
    t = combo_t[pair_combo]
    emptied = (cv - c) <= 0
    with np.errstate(divide="ignore", invalid="ignore"):
        fallback = np.where(emptied, u, (1.0 - lam) * u)
        own = p * np.log(p / fallback)
        others = np.where(emptied, 0.0, -(combo_f[pair_combo] - p * np.log1p(c * t / p)))
        unseen = (1.0 - lam) * np.log(1.0 - lam) * (1.0 - u) if lam < 1.0 else np.zeros_like(u)
        kl = own + others + np.where(emptied, unseen, 0.0)
    kl = np.where(np.isnan(kl), np.inf, kl)
    return (cv / total) * np.maximum(kl, 0.0)


def _plain_scores(tables: CountTables, rule: str, lam: float) -> np.ndarray:
    return tables.pair_count.astype(np.float64) if rule == "count" else _plain_entropy_scores(tables, lam)


def _plain_size(tables: CountTables, lam: float, **build: int) -> tuple[int, list]:
    chunks = encode_sections(build_sections(tables, lam=lam, **build), minor=2)
    return sum(len(c) for c in chunks), chunks


def _plain_choose(tables: CountTables, max_bytes: int, rule: str, lam: float, **build: int) -> np.ndarray:
    n = tables.n_words
    pv = _plain_scores(tables, rule, lam)
    wv = word_values(tables, rule, lam, pv)  # type: ignore[arg-type]
    no_pairs = np.zeros(len(tables.pair_count), dtype=bool)
    vocab_only = _plain_size(prune_tables(tables, no_pairs), lam, **build)[0]
    one = np.zeros(n, dtype=bool)
    one[int(np.argmax(wv))] = True
    fixed = _plain_size(prune_tables(drop_words(tables, one), np.zeros(0, dtype=bool)), lam, **build)[0]
    full = _plain_size(prune_tables(tables, ~no_pairs), lam, **build)[0]
    per_word = max((vocab_only - fixed) / max(n - 1, 1), 1e-9)
    per_pair = max((full - vocab_only) / max(len(pv), 1), 1e-9)
    value = np.concatenate([wv / per_word, np.where(np.isfinite(pv), pv / per_pair, np.inf)])
    cost = np.concatenate([np.full(n, per_word), np.full(len(pv), per_pair)])
    order = np.argsort(-value, kind="stable")
    fits = fixed + np.cumsum(cost[order]) - per_word <= max_bytes
    taken = order[fits] if fits.all() else order[: int(np.argmin(fits))]
    keep = np.zeros(n, dtype=bool)
    keep[taken[taken < n]] = True
    keep[int(np.argmax(wv))] = True
    return keep


def _plain_prune(tables: CountTables, max_bytes: int, rule: str, lam: float, vocabulary: bool = True, **build: int):  # type: ignore[no-untyped-def]
    words_before = tables.n_words
    all_pairs = np.ones(len(tables.pair_count), dtype=bool)
    if vocabulary and _plain_size(prune_tables(tables, all_pairs), lam, **build)[0] > max_bytes:
        keep = _plain_choose(tables, max_bytes, rule, lam, **build)
        wv = word_values(tables, rule, lam, _plain_scores(tables, rule, lam))  # type: ignore[arg-type]
        while True:
            smaller = drop_words(tables, keep) if not keep.all() else tables
            floor = _plain_size(prune_tables(smaller, np.zeros(len(smaller.pair_count), dtype=bool)), lam, **build)[0]
            if floor <= max_bytes:
                break
            if keep.sum() == 1:
                raise nextword.InvalidArgumentError("below the smallest possible model")
            kept = np.flatnonzero(keep)
            keep[kept[np.argsort(wv[kept], kind="stable")[: max(1, len(kept) // 10)]]] = False
        pruned, chunks, info = _plain_prune(smaller, max_bytes, rule, lam, False, **build)
        if info["removed"] == 0 and not keep.all():
            back = np.flatnonzero(~keep)
            back = back[np.argsort(-wv[back], kind="stable")]
            lo, hi = 0, len(back)
            while lo < hi:
                mid = (lo + hi + 1) // 2
                trial = keep.copy()
                trial[back[:mid]] = True
                t = drop_words(tables, trial) if not trial.all() else tables
                if _plain_size(prune_tables(t, np.ones(len(t.pair_count), dtype=bool)), lam, **build)[0] <= max_bytes:
                    lo = mid
                else:
                    hi = mid - 1
            if lo:
                keep[back[:lo]] = True
                smaller = drop_words(tables, keep) if not keep.all() else tables
                pruned, chunks, info = _plain_prune(smaller, max_bytes, rule, lam, False, **build)
            info["took_back"] = lo
        info["words_removed"] = words_before - smaller.n_words
        info["words_kept"] = smaller.n_words
        return pruned, chunks, info
    order = np.argsort(-_plain_scores(tables, rule, lam), kind="stable")
    total_pairs = len(order)

    def build_with(k: int):  # type: ignore[no-untyped-def]
        keep = np.zeros(total_pairs, dtype=bool)
        keep[order[:k]] = True
        pruned = prune_tables(tables, keep)
        size, chunks = _plain_size(pruned, lam, **build)
        return pruned, size, chunks

    _, base_size, _ = build_with(0)
    if base_size > max_bytes:
        raise nextword.InvalidArgumentError("below the vocabulary alone")
    full, full_size, chunks = build_with(total_pairs)
    if full_size <= max_bytes:
        return full, chunks, {"kept": total_pairs, "removed": 0, "bytes": full_size, "words_kept": words_before, "words_removed": 0}
    per_pair = (full_size - base_size) / max(total_pairs, 1)
    k = int((max_bytes - base_size) / per_pair)
    while True:
        pruned, size, chunks = build_with(k)
        if size <= max_bytes:
            return pruned, chunks, {"kept": k, "removed": total_pairs - k, "bytes": size, "words_kept": words_before, "words_removed": 0}
        k = max(0, min(k - 1, int(k - (size - max_bytes) / per_pair * 1.02) - 1))


#: a few frequent words and many rare ones, so rows hold several distinct counts
RARE_AND_COMMON = ["the", "the", "the", "a", "a", "at", "bell", "brake", "chain", "crank", "fork", "gear", "hub", "pedal", "rim"]


def _topic_lines(first: int, last: int) -> list[str]:
    from pydoc_data.topics import topics  # real English shipped with CPython

    return [ln for k in sorted(topics)[first:last] for ln in topics[k].splitlines() if ln.strip()]


@settings(max_examples=40, deadline=None)
@given(
    st.lists(st.lists(st.sampled_from(RARE_AND_COMMON), min_size=1, max_size=10).map(" ".join), min_size=1, max_size=30),
    st.sampled_from([0.0, 0.5, 0.9, 0.999]),
    st.sampled_from([(1 << 16, 256), (8, 3), (5, 1), (64, 2)]),
)
def test_entropy_scores_equal_the_plain_expansion_bit_for_bit(msgs: list[str], lam: float, blocking: tuple[int, int]) -> None:
    # the blocked evaluation (long rows broadcast, short rows gathered, any block size) adds
    # the same terms in the same order as one flat expansion: equal floats, not just close
    from nextword import prune

    b = CountBuilder()
    b.add_texts(msgs)
    tables = b.tables(min_count=1)
    saved = prune._BLOCK, prune._LONG_ROW
    prune._BLOCK, prune._LONG_ROW = blocking
    try:
        got = prune.pair_scores(tables, "entropy", lam)
    finally:
        prune._BLOCK, prune._LONG_ROW = saved
    want = _plain_entropy_scores(tables, lam)
    assert got.tobytes() == want.tobytes()


def test_entropy_scores_equal_the_plain_expansion_on_real_text() -> None:
    from nextword.prune import pair_scores

    b = CountBuilder()
    b.add_texts(_topic_lines(0, 79))  # rows of "the", "a", "of" … hold hundreds of successors: the broadcast path
    tables = b.tables(min_count=1)
    assert np.bincount(tables.pair_left).max() >= 512
    for lam in (0.3, 0.9):
        assert pair_scores(tables, "entropy", lam).tobytes() == _plain_entropy_scores(tables, lam).tobytes()


@settings(max_examples=200, deadline=None)
@given(st.lists(st.sampled_from([0.0, -0.0, 1.0, 2.5, 2.5, 7.0, np.inf, 1e-300]), max_size=40), st.integers(-1, 42))
def test_top_k_is_the_head_of_a_stable_sort(values: list[float], k: int) -> None:
    from nextword.prune import top_k

    v = np.asarray(values, dtype=np.float64)
    want = np.zeros(len(v), dtype=bool)
    want[np.argsort(-v, kind="stable")[: max(k, 0)]] = True
    assert np.array_equal(top_k(v, k), want)


BUDGETS = (1.0, 0.95, 0.8, 0.6, 0.4, 0.25, 0.15, 0.08, 0.03)


@pytest.mark.parametrize("corpus", [(0, 40), (40, 60), (60, 79)])
@pytest.mark.parametrize("rule", ["entropy", "count"])
def test_the_search_writes_the_bytes_of_the_plain_search(corpus: tuple[int, int], rule: str) -> None:
    from nextword.prune import prune_to_size

    b = CountBuilder()
    b.add_texts(_topic_lines(*corpus))
    tables = b.tables(min_count=1)
    full = _plain_size(prune_tables(tables, np.ones(len(tables.pair_count), dtype=bool)), 0.9)[0]
    paths = set()
    for frac in BUDGETS:
        for vocabulary in (True, False):
            for build in ({}, {"skyband_min": 2, "skyband_k": 3}):
                budget = int(full * frac)
                try:
                    want_t, want_c, want_i = _plain_prune(tables, budget, rule, 0.9, vocabulary, **build)
                except nextword.InvalidArgumentError as e:
                    with pytest.raises(nextword.InvalidArgumentError, match=str(e)):
                        prune_to_size(tables, budget, rule=rule, lam=0.9, vocabulary=vocabulary, **build)  # type: ignore[arg-type]
                    paths.add("error")
                    continue
                got_t, got_c, got_i = prune_to_size(tables, budget, rule=rule, lam=0.9, vocabulary=vocabulary, **build)  # type: ignore[arg-type]
                assert b"".join(map(bytes, got_c)) == b"".join(map(bytes, want_c)), (frac, vocabulary, build)
                paths.add("took back" if want_i.pop("took_back", 0) else "words" if want_i["words_removed"] else
                          "pairs" if want_i["removed"] else "whole")
                assert got_i == want_i
                assert got_t.keys == want_t.keys and np.array_equal(got_t.pair_count, want_t.pair_count)
                assert np.array_equal(got_t.history, want_t.history)
    assert {"whole", "pairs", "words", "error"} <= paths, paths  # every branch of the search was compared


def test_the_search_writes_the_bytes_of_the_plain_search_when_it_takes_words_back() -> None:
    # the branch where the value-per-byte estimate dropped more words than needed; found by
    # scanning budgets of the plain search on this corpus
    from nextword.prune import prune_to_size

    b = CountBuilder()
    b.add_texts(_topic_lines(0, 40))
    tables = b.tables(min_count=1)
    full = _plain_size(prune_tables(tables, np.ones(len(tables.pair_count), dtype=bool)), 0.9)[0]
    seen = 0
    for frac in np.linspace(0.02, 0.6, 59):
        budget = int(full * frac)
        try:
            _, want_c, want_i = _plain_prune(tables, budget, "count", 0.9)
        except nextword.InvalidArgumentError:
            continue
        _, got_c, got_i = prune_to_size(tables, budget, rule="count", lam=0.9)
        seen += bool(want_i.pop("took_back", 0))
        assert b"".join(map(bytes, got_c)) == b"".join(map(bytes, want_c)) and got_i == want_i, frac
    assert seen, "no budget took words back: pick another corpus"


def test_each_file_is_built_once_and_pairs_are_scored_only_when_needed(lines: list[str]) -> None:
    # before: the scores were computed up to three times per vocabulary and the whole file,
    # the empty file and the vocabulary floor were rebuilt; a budget the whole file meets was scored too
    from nextword.prune import prune_to_size

    b = CountBuilder()
    b.add_texts(lines)
    tables = b.tables(min_count=1)
    full = _plain_size(prune_tables(tables, np.ones(len(tables.pair_count), dtype=bool)), 0.9)[0]
    labels: list[str] = []
    prune_to_size(tables, full, rule="entropy", lam=0.9, progress=labels.append)
    assert labels == [f"building a file with {len(tables.pair_count):,} of {len(tables.pair_count):,} pairs"]
    for budget, vocabulary in ((full * 3 // 4, False), (full * 3 // 4, True), (full // 4, True)):
        labels = []
        prune_to_size(tables, budget, rule="entropy", lam=0.9, vocabulary=vocabulary, progress=labels.append)
        scored = [x for x in labels if x.startswith("scoring")]
        assert len(scored) == len(set(scored)) >= 1 and len(labels) == len(set(labels)), labels


@settings(max_examples=25, deadline=None)
@given(
    st.lists(st.lists(st.sampled_from(["a", "b", "c", "d", "e", "f"]), min_size=1, max_size=8).map(" ".join),
             min_size=1, max_size=10),
    st.sampled_from([0.0, 0.5, 0.9, 0.99]),
)
def test_entropy_score_is_the_exact_relative_entropy_of_removing_the_pair(msgs: list[str], lam: float) -> None:
    # Stolcke (1998), eq. for D(p || p'): the weighted relative entropy between the model
    # with and without one pair. Brute force: write both models, ask each for P(w | v)
    # over every outcome, sum P(v) · Σ_w P ln(P / P') with P(v) = c(v)/N.
    import tempfile

    from nextword.prune import pair_scores, prune_tables
    from nextword.store import write_model

    b = CountBuilder()
    b.add_texts(msgs)
    tables = b.tables(min_count=1)
    scores = pair_scores(tables, "entropy", lam)
    n = tables.n_words
    names = tables.keys + ["</s>", "<unk>", "<s>"]
    outcomes = tables.keys + ["</s>", "<unk>"]
    total = float(tables.unigram.sum())
    with tempfile.TemporaryDirectory() as tmp:
        full_path = Path(tmp) / "full.nwm"
        write_model(prune_tables(tables, np.ones(len(tables.pair_count), dtype=bool)), full_path, lam=lam)
        full = nextword.load(full_path)
        for j in range(len(tables.pair_count)):
            keep = np.ones(len(tables.pair_count), dtype=bool)
            keep[j] = False
            path = Path(tmp) / f"p{j}.nwm"
            write_model(prune_tables(tables, keep), path, lam=lam)
            pruned = nextword.load(path)
            v = int(tables.pair_left[j])
            prev = None if v == n + 2 else names[v]
            cv = float(tables.pair_count[tables.pair_left == v].sum())
            d = 0.0
            for w in outcomes:
                p, q = full.prob(w, prev), pruned.prob(w, prev)
                if p > 0:
                    d += p * (math.log(p / q) if q > 0 else math.inf)
            want = cv / total * d
            assert scores[j] == pytest.approx(want, rel=1e-9, abs=1e-12), (j, names[v])
            pruned.close()
        full.close()


# -- shrinking the vocabulary ---------------------------------------------------------------------


RARE = ["bell", "brake", "chain", "crank", "fork", "gear", "hub", "pedal", "rim", "saddle", "spoke", "tube"]


@settings(max_examples=40, deadline=None)
@given(st.lists(st.lists(st.sampled_from(RARE), min_size=1, max_size=6), min_size=1, max_size=12), st.integers(1, 15))
def test_dropping_the_rarest_words_equals_retraining_with_a_smaller_vocabulary(rows: list[list[str]], keep: int) -> None:
    # An independent path to the same counts: CountBuilder.tables(max_vocab=K) keeps the K most
    # frequent words (ties by key) and maps the rest to <unk> while counting. The rare words are
    # always separated by "the", so no two unknown words are ever adjacent (the counter merges
    # runs of unknown tokens into one, which dropping cannot know about).
    from nextword.prune import drop_words

    msgs = [" ".join(f"the {w}" for w in row) for row in rows]
    b = CountBuilder()
    b.add_texts(msgs)
    full = b.tables(min_count=1)
    keep = min(keep, full.n_words)
    mask = np.arange(full.n_words) < keep
    dropped = drop_words(full, mask)
    want = b.tables(min_count=1, max_vocab=keep)
    assert dropped.keys == want.keys and dropped.displays == want.displays
    assert np.array_equal(dropped.unigram, want.unigram)
    assert np.array_equal(dropped.pair_left, want.pair_left)
    assert np.array_equal(dropped.pair_right, want.pair_right)
    assert np.array_equal(dropped.pair_count, want.pair_count)
    assert dropped.history is None


@pytest.mark.parametrize("rule", ["entropy", "count"])
def test_a_budget_below_the_vocabulary_shrinks_it(lines: list[str], tmp_path: Path, rule: str) -> None:
    b = CountBuilder()
    b.add_texts(lines)
    tables = b.tables(min_count=1)
    floor = vocabulary_bytes(tables)
    budget = floor * 6 // 10  # before: "below the vocabulary alone; lower max_vocab"
    _, chunks, info = prune_to_size(tables, budget, rule=rule, lam=0.9)  # type: ignore[arg-type]
    out = tmp_path / "small.nwm"
    atomic_write(out, chunks)
    assert out.stat().st_size <= budget
    m = nextword.load(out, verify=True)
    assert 0 < m.n_words < tables.n_words and info["words_removed"] == tables.n_words - m.n_words
    assert info["kept"] > 0  # the split keeps pairs too, not only words
    vocab = [w for w, _ in m.words()] + ["</s>", "<unk>"]
    for prev in [None, "the", "is", "<unk>", "zebra"]:
        assert math.fsum(m.prob(w, prev) for w in vocab) == pytest.approx(1.0, abs=1e-12)
    # the count rule drops the rarest words first: every kept word is at least as frequent as every dropped one
    if rule == "count":
        kept = {nextword.text.fold(w) for w, _ in m.words()}
        low = min(int(tables.unigram[i]) for i, k in enumerate(tables.keys) if k in kept)
        high = max((int(tables.unigram[i]) for i, k in enumerate(tables.keys) if k not in kept), default=0)
        assert low >= high


def test_info_splits_the_file_into_vocabulary_and_pair_bytes(lines: list[str], tmp_path: Path) -> None:
    # the section lengths come from the file's own section table (docs/FORMAT.md §4), read here with struct
    import json
    import os
    import subprocess
    import sys

    from nextword.store import ENTRY, HEADER

    b = CountBuilder()
    b.add_texts(lines)
    tables = b.tables(min_count=1)
    full = tmp_path / "full.nwm"
    nextword.store.write_model(tables, full, lam=0.9)
    _, chunks, _ = prune_to_size(tables, vocabulary_bytes(tables) * 8 // 10, lam=0.9)
    small = tmp_path / "small.nwm"
    atomic_write(small, chunks)
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    for path in (full, small):
        data = path.read_bytes()
        lengths = {}
        for i in range(HEADER.unpack_from(data, 0)[3]):
            tag, _, _, length, _ = ENTRY.unpack_from(data, HEADER.size + i * ENTRY.size)
            lengths[tag.decode()] = length
        pair = sum(lengths[t] for t in ("SUCC", "CNTS", "BIGI", "BIGC", "SEGS", "SEGE", "SKYP", "SKYI", "SKYC"))
        vocab = sum(lengths[t] for t in lengths if t not in ("META", "SUCC", "CNTS", "BIGI", "BIGC", "SEGS", "SEGE", "SKYP", "SKYI", "SKYC"))
        r = subprocess.run([sys.executable, "-m", "nextword", "info", str(path), "--json"], capture_output=True, text=True, env=env)
        info = json.loads(r.stdout)
        assert info["pair_bytes"] == pair and info["vocabulary_bytes"] == vocab
        assert info["vocabulary_bytes"] + info["pair_bytes"] + info["other_bytes"] == len(data)
        assert info["vocabulary_share"] == pytest.approx(vocab / len(data))
        assert info["pair_bytes_per_pair"] == pytest.approx(pair / info["bigrams"])
        assert info["file_bytes_per_pair"] == pytest.approx(len(data) / info["bigrams"])
        text = subprocess.run([sys.executable, "-m", "nextword", "info", str(path)], capture_output=True, text=True, env=env).stdout
        assert "pair bytes per pair (vocabulary excluded)" in text and "whole file / pairs (vocabulary included)" in text
        assert f"{100 * vocab / len(data):.1f}%" in text


def test_prune_curve_command_prints_size_against_ksr_and_perplexity(lines: list[str], tmp_path: Path) -> None:
    import json
    import os
    import subprocess
    import sys

    from nextword.evaluate import evaluate, is_held_out

    train = [m for m in lines if not is_held_out(m, 20)]
    held = [m for m in lines if is_held_out(m, 20)]
    model = tmp_path / "m.nwm"
    nextword.train_texts(train, model, min_count=1)
    log = tmp_path / "held.txt"
    log.write_text("\n".join(held) + "\n")
    size = model.stat().st_size
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    sizes = [str(size), str(size * 6 // 10), str(size * 3 // 10)]
    r = subprocess.run([sys.executable, "-m", "nextword", "prune", str(model), "--curve", str(log), "--sizes", *sizes,
                        "--messages", "30", "--json"], capture_output=True, text=True, env=env)
    assert r.returncode == 0, r.stderr
    res = json.loads(r.stdout)
    assert [(row["rule"], row["budget"]) for row in res["rows"]] == [(rule, int(s)) for rule in ("entropy", "count") for s in sizes]
    assert all(row["file_bytes"] <= row["budget"] for row in res["rows"])
    # each row is what evaluating that pruned model gives: recompute one with the library
    row = res["rows"][4]  # count rule, 60 %
    pruned, chunks, _ = prune_to_size(tables_from_model(nextword.load(model)), row["budget"], rule="count", lam=0.9)
    again = tmp_path / "again.nwm"
    atomic_write(again, chunks)
    m = nextword.load(again)
    overall, _ = evaluate(m, [("held", held[:30])], (3,))
    assert row["ksr"] == overall.per_k[3].ksr and row["perplexity"] == pytest.approx(m.perplexity(held), rel=1e-12)
    assert (row["words"], row["pairs"]) == (m.n_words, m.n_bigrams)
    assert res["rows"][0]["ksr"] >= res["rows"][2]["ksr"]  # the full model against 30 % of it (entropy)
    text = subprocess.run([sys.executable, "-m", "nextword", "prune", str(model), "--curve", str(log), "--sizes", *sizes[:2],
                           "--messages", "30"], capture_output=True, text=True, env=env)
    assert text.returncode == 0 and "KSR@3" in text.stdout and len(text.stdout.strip().splitlines()) == 2 + 4
    bad = subprocess.run([sys.executable, "-m", "nextword", "prune", str(model)], capture_output=True, text=True, env=env)
    assert bad.returncode == 2 and bad.stderr.startswith("nextword: error: prune needs -o/--output and --max-size")


@settings(max_examples=30, deadline=None)
@given(
    st.lists(st.lists(st.sampled_from(RARE + ["the", "a", "at"]), min_size=1, max_size=9).map(" ".join), min_size=1, max_size=15),
    st.floats(0.3, 1.0),
    st.sampled_from(["entropy", "count"]),
)
def test_any_budget_gives_a_valid_distribution(msgs: list[str], frac: float, rule: str) -> None:
    # invariant (common practice for interpolated models): after any pruning, every history's
    # probabilities over all words, </s> and <unk> sum to 1, and the file passes verify=True
    import tempfile

    b = CountBuilder()
    b.add_texts(msgs)
    tables = b.tables(min_count=1)
    with tempfile.TemporaryDirectory() as tmp:
        full = Path(tmp) / "full.nwm"
        nextword.store.write_model(tables, full, lam=0.9)
        budget = int(full.stat().st_size * frac)
        try:
            _, chunks, info = prune_to_size(tables, budget, rule=rule, lam=0.9)  # type: ignore[arg-type]
        except nextword.InvalidArgumentError as e:
            assert "below the smallest possible model" in str(e)  # not even one word fits
            return
        out = Path(tmp) / "p.nwm"
        atomic_write(out, chunks)
        assert out.stat().st_size <= budget
        m = nextword.load(out, verify=True)
        outcomes = [w for w, _ in m.words()] + ["</s>", "<unk>"]
        for prev in [None, "<unk>", *RARE[:3], "the"]:
            assert math.fsum(m.prob(w, prev) for w in outcomes) == pytest.approx(1.0, abs=1e-12)
        m.close()


def test_prune_curve_skips_budgets_below_the_smallest_model_and_draws_the_tradeoff(lines: list[str], tmp_path: Path) -> None:
    import json

    from nextword.cli import main
    from nextword.evaluate import is_held_out

    pytest.importorskip("matplotlib")
    model = tmp_path / "m.nwm"
    nextword.train_texts([m for m in lines if not is_held_out(m, 20)], model, min_count=1)
    log = tmp_path / "held.txt"
    log.write_text("\n".join(m for m in lines if is_held_out(m, 20)) + "\n")
    size = model.stat().st_size
    png = tmp_path / "sizes.png"
    import contextlib
    import io

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        code = main(["prune", str(model), "--curve", str(log), "--sizes", str(size * 6 // 10), "100",
                     "--messages", "20", "--plot", str(png), "--json"])
    assert code == 0
    res = json.loads(buf.getvalue())
    # 100 bytes is below any model: reported per rule, the other budget still measured
    assert [(s["rule"], s["budget"]) for s in res["skipped"]] == [("entropy", 100), ("count", 100)]
    assert "smallest possible model" in res["skipped"][0]["reason"]
    assert [(r["rule"], r["budget"]) for r in res["rows"]] == [("entropy", size * 6 // 10), ("count", size * 6 // 10)]
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and res["plot"] == str(png)


def test_prune_curve_plot_without_matplotlib_is_one_line_before_any_work(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                                        capsys: pytest.CaptureFixture[str]) -> None:
    import nextword.report
    from nextword.cli import main

    nextword.train_texts(["we fix bikes on thursday", "we fix wheels on friday"], tmp_path / "m.nwm", min_count=1)
    (tmp_path / "held.txt").write_text("we fix bikes\n")
    monkeypatch.setattr(nextword.report, "plots_available", lambda: False)
    code = main(["prune", str(tmp_path / "m.nwm"), "--curve", str(tmp_path / "held.txt"), "--plot", str(tmp_path / "s.png")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "needs matplotlib" in err and "s.png" in err
    assert not (tmp_path / "s.png").exists()
