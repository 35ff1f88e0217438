"""Damaged bigram data never yields a probability outside [0, 1] from a default load.

The bigram-sized sections are not checksummed on a plain ``load`` (docs/FORMAT.md §8), so a
changed pair count used to reach the formula λ·c(v,w)/c(v) + (1−λ)·c(w)/N unchecked: a
count above c(v) gave probabilities far above 1 (seen: 3.9e6 from a damaged escaped
count). The bound that rules it out is c(v,w) ≤ c(v), which holds in every valid file
because a row's counts sum to c(v) (§7.8). Each mutation below either fails to load, or
raises ModelFormatError at the query that reads the bad count, or answers in [0, 1].
"""

from __future__ import annotations

import math
import struct
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword import ModelFormatError
from nextword.counts import CountBuilder
from nextword.prune import prune_to_size
from nextword.store import ENTRY, HEADER, atomic_write

# counts on both sides of the one-byte escape (255), long rows for segments and skybands
MSGS = ["the cat sat on the mat"] * 300 + ["the dog sat. a cat ran", "Bo and Abe sat on a mat", "the mat is red"] * 4
WORDS = ["the", "cat", "sat", "on", "mat", "dog", "a", "ran", "bo", "and", "abe", "is", "red", "</s>", "<unk>"]
HISTORIES = [None, "<unk>", *WORDS[:-2]]
BIGRAM_SECTIONS = [b"SUCC", b"CNTS", b"BIGI", b"BIGC", b"SEGS", b"SEGE", b"SKYP", b"SKYI", b"SKYC"]


def _model(pruned: bool) -> bytes:
    d = Path(tempfile.mkdtemp())
    b = CountBuilder()
    b.add_texts(MSGS)
    tables = b.tables(min_count=1)
    if not pruned:
        nextword.store.write_model(tables, d / "m.nwm", lam=0.9, skyband_min=1, skyband_k=2)
    else:
        full = d / "full.nwm"
        nextword.store.write_model(tables, full, lam=0.9, skyband_min=1, skyband_k=2)
        _, chunks, _ = prune_to_size(tables, full.stat().st_size - 24, lam=0.9, skyband_min=1, skyband_k=2)
        atomic_write(d / "m.nwm", chunks)
    return (d / "m.nwm").read_bytes()


MODELS = {False: _model(False), True: _model(True)}


def _sections(data: bytes) -> dict[bytes, tuple[int, int]]:
    n_sec = HEADER.unpack_from(data, 0)[3]
    out = {}
    for i in range(n_sec):
        tag, _, off, length, _ = ENTRY.unpack_from(data, HEADER.size + i * ENTRY.size)
        out[tag] = (off, length)
    return out


def _check_every_answer(m: nextword.Model) -> int:
    """Ask prob/suggest/perplexity everything; return how many answers were checked."""
    answered = 0
    for lam in (None, 0.9, 1.0):
        for prev in HISTORIES:
            for w in WORDS:
                try:
                    p = m.prob(w, prev, lam=lam)
                except ModelFormatError:
                    continue
                assert 0.0 <= p <= 1.0, (w, prev, lam, p)
                answered += 1
        for typed in ["", "the ", "the c", "Bo a", "cat ", "a m", "zz ", "on the "]:
            for k in (1, 3, 10):
                try:
                    sugg = m.suggest(typed, k, lam=lam)
                except ModelFormatError:
                    continue
                assert all(0.0 <= s.prob <= 1.0 and not math.isnan(s.prob) for s in sugg), (typed, sugg)
                answered += 1
        try:
            ppl = m.perplexity(MSGS[-3:], lam=lam)
        except ModelFormatError:
            continue
        assert ppl >= 1.0 or math.isclose(ppl, 1.0)  # perplexity < 1 would need some P > 1
    return answered


@pytest.mark.parametrize("pruned", [False, True])
def test_the_undamaged_models_answer_everything(pruned: bool) -> None:
    path = Path(tempfile.mkdtemp()) / "m.nwm"
    path.write_bytes(MODELS[pruned])
    m = nextword.load(path, verify=True)
    assert len(m._src.arrays["BIGI"]) > 0  # the escape path is exercised
    assert _check_every_answer(m) == 3 * (len(HISTORIES) * len(WORDS) + 8 * 3)


@settings(max_examples=250, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_damaged_pair_data_never_gives_a_probability_outside_0_1(data: st.DataObject) -> None:
    pruned = data.draw(st.booleans())
    buf = bytearray(MODELS[pruned])
    secs = _sections(bytes(buf))
    for _ in range(data.draw(st.integers(1, 3))):
        off, length = secs[data.draw(st.sampled_from([t for t in BIGRAM_SECTIONS if secs[t][1]]))]
        i = off + data.draw(st.integers(0, length - 1))
        buf[i] = data.draw(st.integers(0, 255))
    path = Path(tempfile.mkdtemp()) / "bad.nwm"
    path.write_bytes(bytes(buf))
    try:
        m = nextword.load(path)
    except ModelFormatError:
        return
    _check_every_answer(m)


@pytest.mark.parametrize("pruned", [False, True])
@pytest.mark.parametrize("tag", [b"CNTS", b"BIGC"])
def test_a_count_raised_above_its_history_is_caught(pruned: bool, tag: bytes) -> None:
    # the worst case by hand: set the largest count of the section to its type's maximum
    # (254 as a one-byte count, 0xFFFFFFFF as an escaped one); c(v) ≤ 300 + 12 here
    buf = bytearray(MODELS[pruned])
    off, length = _sections(bytes(buf))[tag]
    if tag == b"CNTS":
        arr = np.frombuffer(bytes(buf[off : off + length]), dtype=np.uint8)
        small = np.flatnonzero(arr < 255)
        for i in small:
            buf[off + int(i)] = 254
    else:
        buf[off : off + length] = struct.pack("<I", 0xFFFFFFFF) * (length // 4)
    path = Path(tempfile.mkdtemp()) / "bad.nwm"
    path.write_bytes(bytes(buf))
    if tag == b"BIGC":  # escapes are few: bounded by their row's c(v) on every load
        with pytest.raises(ModelFormatError, match="BIGC holds a pair count above its history count"):
            nextword.load(path)
        return
    m = nextword.load(path)  # one-byte counts are bounded where a query reads them
    assert _check_every_answer(m) > 0
    # c(and) = 4 (by hand: four "Bo and Abe" messages) < 254, so reading its row must fail
    raised = 0
    for prev in HISTORIES:
        for w in WORDS:
            try:
                m.prob(w, prev)
            except ModelFormatError as e:
                assert "above its history count" in str(e)
                raised += 1
    assert raised > 0
    with pytest.raises(ModelFormatError, match="above its history count"):
        m.suggest("Bo and ", 3)


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_any_changed_bytes_that_load_give_probabilities_in_0_1(data: st.DataObject) -> None:
    # anywhere in the file: most changes are caught by the checksums on load, the rest must
    # still answer within [0, 1] (or raise ModelFormatError at the query)
    pruned = data.draw(st.booleans())
    buf = bytearray(MODELS[pruned])
    for i, b in data.draw(st.lists(st.tuples(st.integers(0, len(buf) - 1), st.integers(0, 255)), min_size=1, max_size=4)):
        buf[i] = b
    path = Path(tempfile.mkdtemp()) / "bad.nwm"
    path.write_bytes(bytes(buf))
    try:
        m = nextword.load(path)
    except ModelFormatError:
        return
    _check_every_answer(m)
