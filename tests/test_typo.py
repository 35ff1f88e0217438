"""Typo-tolerant completion (issue 17): keyboard geometry, the typing channel, near-miss candidates.

Outside references, named beside each check:
* nltk.edit_distance(..., transpositions=True) (nltk, the ``test`` extra) — the optimal
  string alignment distance — for the edit moves of the channel;
* hand arithmetic on a three-key layout for the channel weight and the noisy-channel score;
* a brute force that scores *every* vocabulary word by the channel's dynamic program
  (``Channel.weight`` over every prefix of the word) × ``Model.probs_after`` and sorts,
  for the trie search and the merged ranking (suggest with tolerance equals it exactly).
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

import nextword
from nextword.errors import InputDataError, InvalidArgumentError
from nextword.keyboard import LAYOUTS, Channel, Layout, load_layout, parse_layout, sample_extra, sample_miss

# -- geometry ----------------------------------------------------------------------------------


def test_shipped_layouts_load_and_hold_the_letters() -> None:
    for name in LAYOUTS:
        lay = load_layout(name)
        assert lay.name == name
        assert len(lay.letters) == len(set(lay.letters))
    assert sorted(load_layout("qwerty").letters) == list("abcdefghijklmnopqrstuvwxyz")
    assert sorted(load_layout("azerty").letters) == list("abcdefghijklmnopqrstuvwxyz")
    assert set("üöä") <= set(load_layout("qwertz").letters)


def test_qwerty_distances_by_hand() -> None:
    # rows 1 key pitch apart, staggered 0, 0.25, 0.75 pitches (common practice for QWERTY)
    lay = load_layout("qwerty")
    assert lay.distance("q", "w") == 1.0
    assert lay.distance("f", "j") == 3.0  # same row, three keys apart
    assert lay.distance("q", "a") == pytest.approx(math.hypot(0.25, 1.0))
    assert lay.distance("s", "x") == pytest.approx(math.hypot(0.5, 1.0))  # s at 1.25, x at 1.75
    assert lay.distance("q", "m") == pytest.approx(math.hypot(6.75, 2.0))
    assert lay.nearest(4.3, 1.1) == "g"  # g's centre is (4.25, 1)
    # QWERTZ swaps y and z against QWERTY; AZERTY swaps a/q and z/w (common practice)
    assert load_layout("qwertz").centres["z"] == lay.centres["y"]
    assert load_layout("azerty").centres["a"] == lay.centres["q"]


@pytest.mark.skipif(sys.version_info < (3, 11), reason="tomllib is in the standard library from Python 3.11")
def test_shipped_layouts_are_package_data() -> None:
    # the layouts are read with importlib.resources, so an install must carry them: every
    # file of nextword/layouts matches a package-data glob of pyproject.toml (setuptools
    # matches them relative to the package directory: common practice)
    import fnmatch
    import tomllib

    root = Path(__file__).resolve().parent.parent
    globs = tomllib.loads((root / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]["package-data"]["nextword"]
    files = sorted(p.relative_to(root / "nextword").as_posix() for p in (root / "nextword" / "layouts").iterdir())
    assert files == [f"layouts/{name}.json" for name in sorted(LAYOUTS)]
    assert all(any(fnmatch.fnmatch(f, g) for g in globs) for f in files)


def test_layout_file_round_trip_and_hostile_files(tmp_path: Path) -> None:
    good = {"format": "nextword-layout", "version": 1, "name": "abc", "rows": [{"keys": "abc", "x": 0, "y": 0}]}
    p = tmp_path / "abc.json"
    p.write_text(json.dumps(good))
    lay = load_layout(p)
    assert lay.centres == {"a": (0.0, 0.0), "b": (1.0, 0.0), "c": (2.0, 0.0)}
    bad_cases = [
        ([], "JSON object"),
        ({**good, "format": "other"}, "format"),
        ({**good, "version": 2}, "version"),
        ({**good, "name": ""}, "name"),
        ({**good, "rows": []}, "rows"),
        ({**good, "rows": [{"keys": "aa", "x": 0, "y": 0}]}, "twice"),
        ({**good, "rows": [{"keys": "A", "x": 0, "y": 0}]}, "'A'"),
        ({**good, "rows": [{"keys": "1", "x": 0, "y": 0}]}, "'1'"),
        ({**good, "rows": [{"keys": "ab", "x": "0", "y": 0}]}, "x"),
        ({**good, "rows": [{"keys": "ab", "x": 0, "y": float("nan")}]}, "y"),
    ]
    for data, needle in bad_cases:
        with pytest.raises(InputDataError, match=needle):
            parse_layout(data)
    (tmp_path / "broken.json").write_text("{not json")
    with pytest.raises(InputDataError, match="broken.json"):
        load_layout(tmp_path / "broken.json")
    with pytest.raises(InvalidArgumentError, match="nowhere"):
        load_layout(tmp_path / "nowhere.json")


def test_misses_follow_the_gaussian_and_are_seeded() -> None:
    lay = load_layout("qwerty")
    a = [sample_miss(lay, "g", np.random.default_rng(5)) for _ in range(3)]
    assert a == [sample_miss(lay, "g", np.random.default_rng(5)) for _ in range(3)]
    rng = np.random.default_rng(1)
    draws = [sample_miss(lay, "g", rng) for _ in range(3000)]
    assert "g" not in draws
    # reference: the same conditional distribution by numerical integration of the Gaussian
    # density (σ = 0.5) over a fine grid, each grid point read as its nearest key centre
    g = lay.centres["g"]
    xs = np.arange(-3.0, 3.0, 0.01) + 0.005
    gx, gy = np.meshgrid(g[0] + xs, g[1] + xs)
    dens = np.exp(-((gx - g[0]) ** 2 + (gy - g[1]) ** 2) / (2 * 0.5**2))
    cen = lay.centre_array()
    nearest = np.argmin((gx[..., None] - cen[:, 0]) ** 2 + (gy[..., None] - cen[:, 1]) ** 2, axis=-1)
    miss = nearest != lay.letters.index("g")
    for c in "fhtyvb":  # the six neighbours of g
        expect = dens[miss & (nearest == lay.letters.index(c))].sum() / dens[miss].sum()
        got = draws.count(c) / len(draws)
        assert abs(got - expect) < 4 * math.sqrt(expect * (1 - expect) / len(draws)) + 0.005, (c, got, expect)
    extras = [sample_extra(lay, "g", rng) for _ in range(2000)]
    assert 0.3 < extras.count("g") / len(extras) < 0.9  # the same key again: a double tap


# -- the channel ----------------------------------------------------------------------------------

_ABC = Layout("abc", {"a": (0.0, 0.0), "b": (1.0, 0.0), "c": (2.0, 0.0)})


def test_channel_weight_by_hand() -> None:
    ch = Channel(_ABC, substitution=0.1, omission=0.02, insertion=0.03, transposition=0.04, sigma=1.0, max_edits=2,
                 floor=1e-9)
    c = 1 - 0.1 - 0.02 - 0.03 - 0.04  # 0.81: typing a letter right
    # substitution b typed for intended a: kernel exp(-d²/2) over the other keys b (d=1), c (d=2)
    w_ab = math.exp(-0.5) / (math.exp(-0.5) + math.exp(-2.0))
    assert ch.weight("b", "a") == pytest.approx(0.1 * w_ab / c, rel=1e-12)
    assert ch.weight("ab", "ab") == 1.0  # the exact reading, relative weight 1
    assert ch.weight("a", "ab") == pytest.approx(0.02)  # b omitted: o, no typed letter consumed
    # extra tap c after intended b: insertion kernel over a, b, c (b itself at d=0)
    w_bc = math.exp(-0.5) / (math.exp(-0.5) + 1.0 + math.exp(-0.5))
    assert ch.weight("bc", "b") == pytest.approx(0.03 * w_bc / c, rel=1e-12)
    assert ch.weight("ba", "ab") == pytest.approx(0.04 / c**2, rel=1e-12)  # a swap consumes two typed letters
    # two edits: substitution then omission, the product of both
    assert ch.weight("b", "ac") == pytest.approx(0.1 * w_ab / c * 0.02, rel=1e-12)
    assert Channel(_ABC, substitution=0.1, sigma=1.0, max_edits=1, floor=1e-9).weight("bb", "ac") == 0.0  # 2 edits
    assert Channel(_ABC, substitution=0.1, sigma=1.0, floor=0.5).weight("b", "a") == 0.0  # below the floor


def test_noisy_channel_score_by_hand(tmp_path: Path) -> None:
    # corpus "ab ab ac" and "ac": c(ab)=2, c(ac)=2, N = 4 words + 2 sentence ends = 6 tokens
    path = tmp_path / "m.nwm"
    nextword.train_texts(["ab ab ac", "ac"], path, min_count=1, lam=0.5)
    model = nextword.load(path)
    ch = Channel(_ABC, substitution=0.1, omission=0.0, insertion=0.0, transposition=0.0, sigma=1.0, floor=1e-9)
    # after "ab" (bigram successors: ab once, ac once; c(ab) = 2 as a history):
    # P(ac | ab) = 0.5 · 1/2 + 0.5 · 2/6 = 0.41666…
    p_ac = 0.5 * 1 / 2 + 0.5 * 2 / 6
    assert model.prob("ac", "ab") == pytest.approx(p_ac, rel=1e-12)
    # typed "ab cc": the prefix "cc" reads as "ac" by one substitution a→c (d = 2):
    w_ac = math.exp(-2.0) / (math.exp(-0.5) + math.exp(-2.0))  # P(tap c | meant a, missed)
    weight = 0.1 * w_ac / 0.9
    got = model.suggest("ab cc", 3, typo=ch)
    assert [s.word for s in got] == ["ac"]
    assert got[0].prob == pytest.approx(weight * p_ac, rel=1e-12)
    assert model.suggest("ab cc", 3) == []  # no word starts with "cc": plain completion offers nothing


@settings(max_examples=300, deadline=None)
@given(st.text("abcd", max_size=7), st.text("abcd", max_size=7))
def test_edit_count_is_the_optimal_string_alignment_distance(typed: str, intended: str) -> None:
    # reference: rapidfuzz.distance.OSA (the ``test`` extra; optimal string alignment: the
    # adjacent-swap distance in which no substring is edited twice, the channel's moves)
    from rapidfuzz.distance import OSA

    assert Channel().edit_count(typed, intended) == OSA.distance(typed, intended)
    # reference: nltk.edit_distance (Levenshtein) for the moves without the swap
    import nltk

    assert Channel().edit_count(typed, intended, transpositions=False) == nltk.edit_distance(typed, intended)


def test_channel_arguments_are_checked() -> None:
    for kwargs, needle in [
        ({"substitution": -0.1}, "substitution"),
        ({"omission": 0.6}, "omission"),
        ({"substitution": 0.3, "omission": 0.3}, "sum"),
        ({"max_edits": 4}, "max_edits"),
        ({"floor": 0.0}, "floor"),
        ({"sigma": 0.0}, "sigma"),
    ]:
        with pytest.raises(InvalidArgumentError, match=needle):
            Channel(**kwargs)
    with pytest.raises(InvalidArgumentError, match="typo rate"):
        Channel.from_rate(0.7)
    assert Channel.from_rate(0.05) == Channel(substitution=0.05, omission=0.005, insertion=0.005, transposition=0.005)


# -- near misses against brute force ---------------------------------------------------------------

# layout letters in three rows, plus letters off the layout (2-byte é, apostrophe) so prefixes
# cross the 4-byte key heads and omissions reach characters no tap produces
_LETTERS = list("qweasdzxc") + ["é", "'"]


def _corpus(rng: np.random.Generator, n_types: int, n_tokens: int) -> list[str]:
    letters = np.array(_LETTERS)
    types = set()
    while len(types) < n_types:
        w = "".join(rng.choice(letters, size=int(rng.integers(1, 7))))
        if w[0] != "'" and w[-1] != "'" and "''" not in w:
            types.add(w)
    tl = sorted(types)
    weights = 1.0 / (rng.permutation(len(tl)) + 1.0)
    toks = rng.choice(len(tl), size=n_tokens, p=weights / weights.sum())
    words = [tl[i] for i in toks]
    return [" ".join(words[i : i + 8]) for i in range(0, len(words), 8)]


_MODELS: dict[tuple[int, int, str], nextword.Model] = {}


def _model(tmp: Path, seed: int, order: int, smoothing: str) -> nextword.Model:
    key = (seed, order, smoothing)
    if key not in _MODELS:
        rng = np.random.default_rng(seed)
        path = tmp / f"m{seed}{order}{smoothing}.nwm"
        nextword.train_texts(_corpus(rng, 300, 4000), path, min_count=1, order=order, smoothing=smoothing)
        _MODELS[key] = nextword.load(path, verify=True)
    return _MODELS[key]


def _brute_weights(model: nextword.Model, ch: Channel, typed: str) -> dict[str, float]:
    out = {}
    for key in model.word_keys():
        w = max(ch.weight(typed, key[:n]) for n in range(len(key) + 1))
        if w > 0.0:
            out[key] = w
    return out


_channels = st.builds(
    Channel,
    st.just(load_layout("qwerty")),
    substitution=st.sampled_from([0.0, 0.02, 0.05, 0.2]),
    omission=st.sampled_from([0.0, 0.005, 0.05]),
    insertion=st.sampled_from([0.0, 0.005, 0.05]),
    transposition=st.sampled_from([0.0, 0.005, 0.05]),
    sigma=st.sampled_from([0.3, 0.5, 1.0]),
    max_edits=st.integers(0, 2),
    floor=st.sampled_from([1e-6, 1e-4, 1e-2]),
)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 3), ch=_channels, typed=st.text("qweasdzxcé'", min_size=1, max_size=5))
def test_near_miss_ranges_cover_each_word_with_its_best_reading(
    tmp_path_factory: pytest.TempPathFactory, seed: int, ch: Channel, typed: str
) -> None:
    model = _model(tmp_path_factory.getbasetemp(), seed, 2, "jm")
    keys = model.word_keys()
    got: dict[str, float] = {}
    # the near-miss source's readings: each covers the words starting with its prefix (the
    # prefix ranges themselves are checked against brute force in tests/test_candidates.py)
    readings = model.typo_prefixes(typed, ch)
    assert [w for _, w in readings] == sorted((w for _, w in readings), reverse=True)
    for p, w in readings:
        for key in keys:
            if key.startswith(p):
                got[key] = max(got.get(key, 0.0), w)
    assert got == _brute_weights(model, ch, typed)


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    seed=st.integers(0, 3),
    kind=st.sampled_from([(2, "jm"), (2, "kn"), (3, "jm"), (3, "kn")]),
    ch=_channels,
    typed=st.text("qweasdzxcé'", max_size=5),
    k=st.integers(1, 6),
    data=st.data(),
)
def test_suggest_with_tolerance_is_the_brute_force_ranking(
    tmp_path_factory: pytest.TempPathFactory, seed: int, kind: tuple[int, str], ch: Channel, typed: str, k: int,
    data: st.DataObject,
) -> None:
    order, smoothing = kind
    model = _model(tmp_path_factory.getbasetemp(), seed, order, smoothing)
    keys = model.word_keys()
    history = tuple(data.draw(st.lists(st.sampled_from(keys[:40] + [None]), max_size=2)))
    weights = _brute_weights(model, ch, typed) if typed else {key: 1.0 for key in keys}
    assume(weights)
    words = sorted(weights)
    probs = model.probs_after(words, history)
    # reference ranking: every word, score = best channel weight × P(word | history), ties by
    # Model.tie_rank (floor descending, then key: docs/SEAMS.md "Ties")
    brute = sorted(((weights[w] * p, w) for w, p in zip(words, probs)), key=lambda e: (-e[0], model.tie_rank(e[1])))[:k]
    got = model.rank_after(history, typed, k, typo=ch)
    assert [w for w, _ in got] == [w for _, w in brute]
    assert [s for _, s in got] == [s for s, _ in brute]


def test_without_a_likely_typo_the_answer_is_the_plain_one(tmp_path: Path) -> None:
    model = _model(tmp_path, 0, 2, "jm")
    ch = Channel(max_edits=0)  # no edits: exactly the prefix ranges
    for typed in ["", "q", "qw", "as", "zé"]:
        assert model.rank_after(("qa",), typed, 5, typo=ch) == model.rank_after(("qa",), typed, 5)
    with pytest.raises(InvalidArgumentError, match="typo"):
        model.suggest("qa", 3, typo=0.05)  # type: ignore[arg-type]


def test_a_near_miss_holding_the_contexts_best_word_is_ranked(tmp_path: Path) -> None:
    # After "a", "the" is by far the likeliest word; words starting with "r" are rare. Typed
    # "a r": t is next to r on QWERTY, so "the" (read from "t") must outrank the rare "r…"
    # words — the range of "t" may not be skipped by the bound from the context's top list.
    filler = [f"a {w}" for w in ("one", "two", "six", "ten", "cat", "dog", "cow", "pig", "hen", "owl", "elk", "yak")]
    texts = ["a the"] * 200 + ["a rat", "a ram", "a rag", "a ran"] + filler * 3
    path = tmp_path / "m.nwm"
    nextword.train_texts(texts, path, min_count=1)
    model = nextword.load(path)
    ch = Channel(substitution=0.2, omission=0.0, insertion=0.0, transposition=0.0, floor=1e-9)
    got = model.rank_after(("a",), "r", 3, typo=ch)
    weights = _brute_weights(model, ch, "r")
    words = sorted(weights)
    probs = model.probs_after(words, ("a",))
    brute = sorted(((weights[w] * p, w) for w, p in zip(words, probs)), key=lambda e: (-e[0], model.tie_rank(e[1])))[:3]
    assert got == [(w, s) for s, w in brute]
    assert got[0][0] == "the"
