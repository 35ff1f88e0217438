"""The candidate seam (nextword/candidates.py) against brute force.

Oracles: the sorted vocabulary keys of the plain-dict model (``DictBigram``, which shares
only the text rules with the engine) for prefix ranges, and scoring every word of the
union of the ranges for the weighted merge a near-miss source will use (issue 17).
"""

from __future__ import annotations

import bisect
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
from nextword.baselines import DictBigram
from nextword.candidates import CandidateRange, PrefixRange, merge_ranked
from nextword.text import fold

# letters whose UTF-8 forms take 1, 2 and 3 bytes, so prefixes cross the 4-byte key heads
_LETTERS = list("abcelnorst") + ["é", "ж", "日"]


def _corpus(seed: int = 11, n_types: int = 2500, n_tokens: int = 40_000) -> list[str]:
    rng = np.random.default_rng(seed)
    letters = np.array(_LETTERS)
    types = sorted({"".join(rng.choice(letters, size=rng.integers(1, 7))) for _ in range(n_types * 2)})[:n_types]
    weights = 1.0 / (rng.permutation(len(types)) + 1.0)
    toks = rng.choice(len(types), size=n_tokens, p=weights / weights.sum())
    words = [types[i] for i in toks]
    return [" ".join(words[i : i + 10]) for i in range(0, len(words), 10)]


@pytest.fixture(scope="module")
def pair(tmp_path_factory: pytest.TempPathFactory) -> tuple[nextword.Model, DictBigram]:
    msgs = _corpus()
    path: Path = tmp_path_factory.mktemp("cand") / "m.nwm"
    nextword.train_texts(msgs, path, min_count=1)
    model = nextword.load(path, verify=True)
    oracle = DictBigram(msgs, min_count=1)
    assert model.n_words == len(oracle.vocab) > 2 * 128  # more words than one top-list block
    return model, oracle


def _brute_span(keys: list[str], prefix: str) -> tuple[int, int]:
    hits = [i for i, key in enumerate(keys) if key.startswith(prefix)]
    if not hits:
        return (0, 0)
    assert hits == list(range(hits[0], hits[-1] + 1))  # code-point order keeps a prefix contiguous
    return hits[0], hits[-1] + 1


@settings(max_examples=300, deadline=None)
@given(data=st.data())
def test_prefix_range_is_the_brute_force_range(pair: tuple[nextword.Model, DictBigram], data: st.DataObject) -> None:
    model, oracle = pair
    keys = sorted(oracle.vocab)  # alphabetical positions: code-point order of the keys
    prefix = data.draw(
        st.one_of(
            st.text(alphabet=_LETTERS + ["x", "É"], max_size=7),
            st.sampled_from(keys).flatmap(lambda k: st.integers(0, len(k)).map(lambda j: k[:j])),
        )
    )
    source: PrefixRange = model._candidates
    want = _brute_span(keys, fold(prefix))
    lo, hi = source.span(fold(prefix))
    assert (lo, hi) == want or (lo >= hi and want == (0, 0))
    assert source.ranges(fold(prefix)) == ((CandidateRange(*want, 1.0),) if want[0] < want[1] else ())


@settings(max_examples=200, deadline=None)
@given(data=st.data())
def test_top_ids_are_the_most_frequent_of_the_range(pair: tuple[nextword.Model, DictBigram], data: st.DataObject) -> None:
    model, oracle = pair
    keys = sorted(oracle.vocab)
    id_of = {fold(w): i for i, (w, _) in enumerate(model.words())}
    lo = data.draw(st.integers(0, len(keys) - 1))
    hi = data.draw(st.integers(lo + 1, len(keys)))
    k = data.draw(st.integers(1, 40))
    assert model._candidates.top_ids(lo, hi, k) == sorted(id_of[key] for key in keys[lo:hi])[:k]


def _brute_merge(ranges: list[tuple[int, int, float]], prob: list[float], pos: list[int], k: int) -> list[tuple[int, float]]:
    best: dict[int, float] = {}
    for lo, hi, w in ranges:
        for wid in range(len(prob)):
            if lo <= pos[wid] < hi:
                best[wid] = max(best.get(wid, -1.0), w * prob[wid])
    return sorted(best.items(), key=lambda t: (-t[1], t[0]))[:k]  # ties by id, as the model's ranking


@settings(max_examples=300, deadline=None)
@given(data=st.data())
def test_merge_of_per_range_top_k_equals_scoring_the_union(data: st.DataObject) -> None:
    n = data.draw(st.integers(1, 30))
    prob = data.draw(st.lists(st.sampled_from([0.0, 0.01, 0.1, 0.25, 0.5, 0.125]), min_size=n, max_size=n))
    pos = data.draw(st.permutations(list(range(n))))
    k = data.draw(st.integers(1, 8))
    spans = data.draw(st.lists(st.tuples(st.integers(0, n), st.integers(0, n)), min_size=1, max_size=4))
    weights = data.draw(st.lists(st.sampled_from([1.0, 0.5, 0.3, 0.05]), min_size=len(spans), max_size=len(spans)))
    ranges = [(min(a, b), max(a, b), w) for (a, b), w in zip(spans, weights)]
    per = []
    for lo, hi, w in ranges:  # each range ranked exactly on its own, as the model does
        inside = sorted((wid for wid in range(n) if lo <= pos[wid] < hi), key=lambda i: (-prob[i], i))
        per.append((w, [(i, prob[i]) for i in inside[:k]]))
    assert merge_ranked(per, k) == _brute_merge(ranges, prob, pos, k)


class _FixedRanges:
    """A stand-in near-miss source: the ranges of some prefixes, each with a weight."""

    def __init__(self, exact: PrefixRange, prefixes: list[tuple[str, float]]) -> None:
        self.out = tuple(CandidateRange(*exact.span(p), w) for p, w in prefixes if exact.span(p)[0] < exact.span(p)[1])

    def ranges(self, key: str) -> tuple[CandidateRange, ...]:
        return self.out


@settings(max_examples=150, deadline=None)
@given(data=st.data())
def test_model_ranks_several_weighted_ranges_exactly(
    pair: tuple[nextword.Model, DictBigram], data: st.DataObject
) -> None:
    model, oracle = pair
    keys = sorted(oracle.vocab)
    prefixes = data.draw(
        st.lists(
            st.tuples(st.text(alphabet=_LETTERS[:6], min_size=0, max_size=2), st.sampled_from([1.0, 0.4, 0.1])),
            min_size=1, max_size=3,
        )
    )
    prev = data.draw(st.one_of(st.none(), st.sampled_from(oracle.vocab[:30])))
    k = data.draw(st.integers(1, 10))
    lam = data.draw(st.sampled_from([0.9, 0.5, 0.0]))
    exact: PrefixRange = model._candidates
    fake = _FixedRanges(exact, prefixes)
    try:
        model._candidates = fake  # type: ignore[assignment]
        got = model.rank_ids(prev, "", k, lam=lam)
    finally:
        model._candidates = exact
    # brute force: every word of the union, scored weight × P(word | prev), its best weight
    best: dict[str, float] = {}
    for p, w in prefixes:
        for key in keys:
            if key.startswith(p) and exact.span(p)[0] < exact.span(p)[1]:
                best[key] = max(best.get(key, -1.0), w * oracle.prob(key, prev, lam))
    # ties as the engine breaks them: the larger floor c(w)/N, then the key (docs/SEAMS.md "Ties")
    want = sorted(best.items(), key=lambda t: (-t[1], -oracle.unigram[t[0]], t[0]))[:k]
    assert got == want


def test_one_exact_range_keeps_probabilities(pair: tuple[nextword.Model, DictBigram]) -> None:
    model, oracle = pair
    key = sorted(oracle.vocab)[len(oracle.vocab) // 2][:1]
    lo, hi = model._candidates.span(key)
    assert bisect.bisect_left(sorted(oracle.vocab), key) == lo < hi
    got = model.rank_ids(None, key, 5, lam=0.9)
    assert got == oracle.rank(None, key, 5, 0.9)  # DictBigram scores every word (the oracle)
    assert all(0.0 < p <= 1.0 for _, p in got)
