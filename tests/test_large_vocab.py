"""Exactness where the bounded candidate search matters: thousands of words, long rows.

Small hypothesis corpora never reach the multi-level prefix top lists (they need more
than 128 words sharing a prefix) nor the default long-row skyband. Here a random
Zipf-like corpus of ~6,000 word types does, and every answer is compared with the
plain-dict oracle that scores every word.
"""

from __future__ import annotations


import numpy as np
import pytest
from nextword.baselines import DictBigram
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword


def _corpus(seed: int = 7, n_types: int = 6000, n_tokens: int = 120_000) -> list[str]:
    rng = np.random.default_rng(seed)
    letters = np.array(list("abcdeilmnorstu"))
    types = sorted({"".join(rng.choice(letters, size=rng.integers(1, 8))) for _ in range(n_types * 2)})[:n_types]
    ranks = rng.permutation(len(types))
    weights = 1.0 / (ranks + 1.0)
    toks = rng.choice(len(types), size=n_tokens, p=weights / weights.sum())
    words = [types[i] for i in toks]
    return [" ".join(words[i : i + 12]) for i in range(0, len(words), 12)]


@pytest.fixture(scope="module")
def pair(tmp_path_factory: pytest.TempPathFactory) -> tuple[nextword.Model, DictBigram]:
    msgs = _corpus()
    path = tmp_path_factory.mktemp("big") / "big.nwm"
    nextword.train_texts(msgs, path, min_count=1)
    model = nextword.load(path, verify=True)
    assert model.n_words > 4096  # three levels of top lists are in use
    return model, DictBigram(msgs, min_count=1)


def test_default_build_stores_skybands(pair: tuple[nextword.Model, DictBigram]) -> None:
    model, oracle = pair
    assert max(oracle.history.values()) > 0
    assert len(model._mv_skyi) > 0  # some row segments are longer than the default threshold


@settings(max_examples=300, deadline=None)
@given(data=st.data())
def test_prefix_and_next_word_ranking_is_exact(pair: tuple[nextword.Model, DictBigram], data: st.DataObject) -> None:
    model, oracle = pair
    frequent = oracle.vocab[:50]
    prev = data.draw(st.one_of(st.none(), st.sampled_from(frequent), st.sampled_from(oracle.vocab)))
    prefix = data.draw(st.one_of(st.just(""), st.text(alphabet="abcdeilmnorstu", min_size=1, max_size=6)))
    k = data.draw(st.integers(1, 20))
    lam = data.draw(st.sampled_from([0.9, 0.5, 0.99, 0.0, 1.0, 0.3]))
    assert model.rank_ids(prev, prefix, k, lam=lam) == oracle.rank(prev, prefix, k, lam)


@settings(max_examples=300, deadline=None)
@given(data=st.data())
def test_range_top_ids_equals_sorting_the_range(pair: tuple[nextword.Model, DictBigram], data: st.DataObject) -> None:
    model, _ = pair
    n = model.n_words
    lo = data.draw(st.integers(0, n - 1))
    hi = data.draw(st.integers(lo + 1, n))
    k = data.draw(st.integers(1, 70))
    want = np.sort(np.asarray(model._alph[lo:hi], dtype=np.int64))[:k]
    assert model._range_top_ids(lo, hi, k) == want.tolist()
