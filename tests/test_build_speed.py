"""The fast build step against plain definitions.

The build step computes the prefix segments of every long row and each segment's
skyband with vectorised code whose shortcuts (group ids per prefix length, a candidate
filter on the scan, rows sorted a block at a time, sections handed to the writer as
views) are easy to get subtly wrong. Here each piece is compared with a brute force
written straight from the definitions in nextword/store.py and docs/FORMAT.md, on
random inputs shaped to hit the shortcuts' edges: keys that are prefixes of other keys,
long shared prefixes, U+0000 inside keys, segments longer than the scan's first chunk,
k above and below the segment size, blocks of rows smaller than a row.
"""

from __future__ import annotations

import random
from pathlib import Path
from unittest.mock import patch

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword import store
from nextword.counts import CountBuilder, CountTables

SETTINGS = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])

# short keys over few letters share prefixes often; the long stems exercise common
# prefixes beyond the 16 characters compared at once, and "\0" a character that looks
# like the padding of a fixed-width string
_STEMS = ["", "", "", "x" * 17, "ab" * 9, "é日"]
_LETTERS = "ab\0é"
keys_strategy = st.lists(
    st.tuples(st.sampled_from(_STEMS), st.text(alphabet=_LETTERS, min_size=0, max_size=5)).map("".join),
    min_size=1,
    max_size=60,
    unique=True,
).filter(lambda ks: all(ks)).map(sorted)


def brute_segments(keys: list[str], pos: list[int], starts: list[int], ends: list[int], min_len: int) -> set[tuple[int, int]]:
    """Every prefix of every key in a row: the row entries starting with it, if more than min_len."""
    out: set[tuple[int, int]] = set()
    for a, b in zip(starts, ends):
        members = list(range(a, b))
        for i in members:
            key = keys[pos[i]]
            for depth in range(len(key) + 1):
                inside = [j for j in members if keys[pos[j]].startswith(key[:depth])]
                if len(inside) > min_len:
                    assert inside == list(range(inside[0], inside[-1] + 1))  # sorted rows: contiguous
                    out.add((inside[0], inside[-1] + 1))
        if b - a > min_len:
            out.add((a, b))  # the empty prefix, also for a row of no keys
    return out


@SETTINGS
@given(keys_strategy, st.integers(0, 6), st.data())
def test_prefix_segments_are_every_prefix_range(keys: list[str], min_len: int, data: st.DataObject) -> None:
    n = len(keys)
    pos: list[int] = []
    starts: list[int] = []
    ends: list[int] = []
    for _ in range(data.draw(st.integers(0, 5))):
        pos.extend(data.draw(st.lists(st.integers(0, n + 1), max_size=3)))  # entries outside any given range
        row = sorted(data.draw(st.sets(st.integers(0, n - 1), max_size=n)))
        starts.append(len(pos))
        pos.extend(row)
        ends.append(len(pos))
    want = brute_segments(keys, pos, starts, ends, min_len)
    groups = store._prefix_groups(keys, min_len)
    s, e = store._prefix_segments(groups, np.asarray(pos, dtype=np.int64), np.asarray(starts), np.asarray(ends), min_len)
    got = list(zip(s.tolist(), e.tolist()))
    assert got == sorted(want)  # the same ranges, each once, in (start, end) order
    with patch.object(store, "_SEGMENT_BATCH", data.draw(st.integers(1, 8))):  # rows in small batches
        s2, e2 = store._prefix_segments(groups, np.asarray(pos, dtype=np.int64), np.asarray(starts), np.asarray(ends), min_len)
    assert list(zip(s2.tolist(), e2.tolist())) == got


@SETTINGS
@given(keys_strategy)
def test_prefix_groups_follow_shared_prefixes(keys: list[str]) -> None:
    groups = store._prefix_groups(keys, 0)
    assert len(groups) == max(map(len, keys))  # min_len 0: every prefix length has a group of one
    for depth, group in enumerate(groups):
        for p, key in enumerate(keys):
            if len(key) <= depth:
                assert group[p] == -1
            else:
                first = min(q for q, other in enumerate(keys) if other.startswith(key[: depth + 1]))
                assert group[p] == first


def brute_skyband(ids: list[int], counts: list[int], k: int) -> tuple[list[int], list[int]]:
    """By the definition: x dominates w when c(x) >= c(w) and x's id is smaller."""
    ida, ca = np.asarray(ids, dtype=np.int64), np.asarray(counts, dtype=np.int64)
    # doms[w] = how many x have c(x) >= c(w) and id(x) < id(w), all pairs compared
    doms = ((ca[None, :] >= ca[:, None]) & (ida[None, :] < ida[:, None])).sum(axis=1).tolist()
    band = sorted((o for o in range(len(ids)) if doms[o] < k), key=lambda o: (doms[o], o))
    return band, [sum(doms[o] < j for o in band) for j in range(1, k + 1)]


def _skyband_case(seed: int, size: int, k: int, max_count: int, count_type: type, shape: str, dense: bool) -> None:
    rng = np.random.default_rng(seed)
    ids = rng.permutation(size if dense else max(size * 3, 10))[:size]
    counts = rng.integers(1, max_count, size=size, endpoint=True)
    # in real rows ids and counts both follow frequency; "against ids" makes every entry
    # of the scan a new smallest id, one below the bound
    if shape != "independent":
        by_id = np.sort(counts)[::-1] if shape == "follows ids" else np.sort(counts)
        counts = by_id[np.argsort(np.argsort(ids))]
    band, cum = store._skyband(ids, counts.astype(count_type), k)
    want_band, want_cum = brute_skyband(ids.tolist(), counts.tolist(), k)
    assert band.tolist() == want_band
    assert cum.tolist() == want_cum


@SETTINGS
@given(
    st.integers(0, 2**32 - 1),
    st.sampled_from([0, 1, 2, 5, 30, 255, 256, 257, 300, 1100, 3000]),
    st.sampled_from([1, 2, 3, 8, 40, 260]),
    st.sampled_from([2, 5, 1000, 2**32 - 1]),
    st.sampled_from([np.uint32, np.int64]),
    st.sampled_from(["independent", "follows ids", "against ids"]),
    st.booleans(),
)
def test_skyband_matches_the_definition(
    seed: int, size: int, k: int, max_count: int, count_type: type, shape: str, dense: bool
) -> None:
    _skyband_case(seed, size, k, max_count, count_type, shape, dense)


@pytest.mark.parametrize("shape", ["independent", "follows ids", "against ids"])
@pytest.mark.parametrize("dense", [True, False])
@pytest.mark.parametrize("k", [1, 3, 260])
@pytest.mark.parametrize("size", [300, 3000])
def test_skyband_edge_shapes(shape: str, dense: bool, k: int, size: int) -> None:
    """Every shape on segments past the plain loop, into the chunked scan."""
    _skyband_case(size + k, size, k, 10**6, np.uint32, shape, dense)


def _tables(seed: int, dtype: type) -> CountTables:
    rng = random.Random(seed)
    words = ["a", "ab", "abc", "abd", "b", "ba", "bab", "c", "ca", "cab", "x" * 18 + "y", "x" * 18 + "z", "é", "éa"]
    lines = [" ".join(rng.choice(words[: rng.randint(3, len(words))]) for _ in range(rng.randint(1, 12))) for _ in range(400)]
    b = CountBuilder()
    b.add_texts(lines)
    t = b.tables(min_count=1)
    return CountTables(
        keys=t.keys,
        displays=t.displays,
        unigram=t.unigram,
        pair_left=t.pair_left.astype(dtype),
        pair_right=t.pair_right.astype(dtype),
        pair_count=t.pair_count.astype(dtype),
        stats=t.stats,
        history=t.history,
    )


def _file(tables: CountTables, **build: int) -> bytes:
    chunks = store.encode_sections(store.build_sections(tables, lam=0.9, **build))
    return b"".join(chunks)


@pytest.mark.parametrize("seed", range(4))
def test_build_ignores_input_types_pair_order_and_sort_blocks(seed: int, monkeypatch: pytest.MonkeyPatch) -> None:
    base = _tables(seed, np.int64)
    want = _file(base, skyband_min=2, skyband_k=3)
    assert _file(_tables(seed, np.uint32), skyband_min=2, skyband_k=3) == want  # compact input
    shuffled = np.random.default_rng(seed).permutation(len(base.pair_count))
    mixed = CountTables(
        keys=base.keys,
        displays=base.displays,
        unigram=base.unigram,
        pair_left=base.pair_left[shuffled],
        pair_right=base.pair_right[shuffled],
        pair_count=base.pair_count[shuffled],
        stats=base.stats,
    )
    assert _file(mixed, skyband_min=2, skyband_k=3) == want  # pairs not sorted by history
    monkeypatch.setattr(store, "_SORT_BLOCK", 5)  # many blocks, rows longer than one block
    monkeypatch.setattr(store, "_SEGMENT_BATCH", 4)
    assert _file(base, skyband_min=2, skyband_k=3) == want


def test_chunks_are_the_file(tmp_path: Path) -> None:
    tables = _tables(9, np.uint32)
    sections = store.build_sections(tables, lam=0.9, skyband_min=1, skyband_k=2)
    chunks = store.encode_sections(sections)
    path = tmp_path / "m.nwm"
    store.write_model(tables, path, lam=0.9, skyband_min=1, skyband_k=2)
    data = path.read_bytes()
    assert sum(len(c) for c in chunks) == len(data)  # len is bytes, as the size budget relies on
    assert b"".join(chunks) == data
    model = nextword.load(path, verify=True)  # every checksum and derived structure rechecked
    assert model.n_words == tables.n_words
