"""The personal layer: a mixture that sums to 1, exact rankings, forgetting, decay, its file."""

from __future__ import annotations

import math
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
from nextword import ModelFormatError
from nextword.personal import PersonalLayer
from nextword.text import fold


@pytest.fixture(scope="module")
def base(tmp_path_factory: pytest.TempPathFactory) -> nextword.Model:
    from pydoc_data.topics import topics  # real English shipped with CPython

    lines = [ln for k in sorted(topics)[:20] for ln in topics[k].splitlines() if ln.strip()]
    path = tmp_path_factory.mktemp("p") / "base.nwm"
    nextword.train_texts(lines, path, min_count=2)
    return nextword.load(path)


USER = [
    "Ask Zanele about the zorbing trip",
    "the zorbing trip is on Friday",
    "Zanele booked the zorbing trip",
    "send the list to Zanele",
]


def _brute(layer: PersonalLayer, prev: str | None, prefix: str, k: int) -> list[tuple[str, float]]:
    """Score every outcome of the mixture and sort: the definition of the ranking."""
    p = fold(prefix)
    base = layer.base
    scored = [
        (-layer.prob(w, prev), -(base.prob(w, prev) if w in base else 0.0), w)
        for w in layer.vocabulary()
        if w.startswith(p) and w not in layer.blocklist and w not in ("</s>", "<unk>")
        and (w in base or layer.count(w) >= layer.min_uses - 1e-9)
    ]
    scored.sort()  # mixture descending, then the base's probability descending, then key
    return [(w, -s) for s, _, w in scored[:k]]


def test_mixture_sums_to_one_and_weight_rule(base: nextword.Model) -> None:
    layer = PersonalLayer(base, strength=20.0, max_weight=0.5)
    assert layer.weight == 0.0
    for m in USER:
        layer.learn(m)
    # 4 messages -> 6 + 6 + 5 + 5 words + 4 </s> = 26 tokens; μ = 0.5 * 26 / (26 + 20)
    assert layer.tokens == pytest.approx(26.0)
    assert layer.weight == pytest.approx(0.5 * 26 / 46)
    outcomes = layer.vocabulary()
    for prev in [None, "the", "zanele", "zorbing", "is", "<unk>", "never-seen"]:
        assert math.fsum(layer.prob(w, prev) for w in outcomes) == pytest.approx(1.0, abs=1e-12)


def test_word_used_twice_becomes_suggestible(base: nextword.Model) -> None:
    assert "zorbing" not in base
    layer = PersonalLayer(base, min_uses=2, strength=5.0)
    layer.learn("we went zorbing")
    assert "zorbing" not in [fold(s.word) for s in layer.suggest("we went zo", 5)]
    assert layer.prob("zorbing", "went") > 0  # it has probability before it is offered
    layer.learn("more zorbing soon")
    assert [s.word for s in layer.suggest("we went zo", 1)] == ["zorbing"]
    assert [s.word for s in layer.suggest("Ask Za", 3)] == []  # "Zanele" never learned here


def test_learning_then_forgetting_restores_the_base_exactly(base: nextword.Model) -> None:
    layer = PersonalLayer(base)
    texts = ["", "the ", "the c", "is a", "Th"]
    before = [base.suggest(t, 5) for t in texts]
    for m in USER:
        layer.learn(m)
    assert [layer.suggest(t, 5) for t in texts] != before
    for w in {fold(w) for m in USER for w in m.split()}:
        layer.forget(w)
    assert layer.weight == 0.0
    assert [layer.suggest(t, 5) for t in texts] == before
    assert all(layer.prob(w, "the") == base.prob(w, "the") for w in ["the", "object", "</s>", "<unk>"])


def test_forget_removes_the_word_and_its_pairs(base: nextword.Model) -> None:
    layer = PersonalLayer(base, strength=5.0)
    for m in USER:
        layer.learn(m)
    assert layer.pair_count("the", "zorbing") == 3 and layer.pair_count("zorbing", "trip") == 3
    layer.forget("Zorbing")
    assert layer.count("zorbing") == 0
    assert layer.pair_count("the", "zorbing") == 0 and layer.pair_count("zorbing", "trip") == 0
    assert "zorbing" not in [fold(s.word) for s in layer.suggest("the zo", 5)]
    outcomes = layer.vocabulary()
    assert math.fsum(layer.prob(w, "the") for w in outcomes) == pytest.approx(1.0, abs=1e-12)


def test_blocklist_is_never_suggested(base: nextword.Model) -> None:
    layer = PersonalLayer(base, blocklist=["the"])
    assert "the" not in [fold(s.word) for s in layer.suggest("", 10)]
    assert "the" not in [fold(s.word) for s in layer.suggest("th", 10)]
    layer.unblock("the")
    assert "the" in [fold(s.word) for s in layer.suggest("th", 10)]


def test_decay_halves_a_count_after_one_half_life(base: nextword.Model) -> None:
    layer = PersonalLayer(base, half_life_messages=10)
    layer.learn("zorbing")
    c0 = layer.count("zorbing")
    for _ in range(10):
        layer.learn("unrelated words here")
    # each later message multiplies old counts by 2 ** (-1/10); ten of them halve it
    assert layer.count("zorbing") == pytest.approx(c0 / 2, rel=1e-12)


def test_decay_in_days_halves_after_one_half_life(base: nextword.Model) -> None:
    layer = PersonalLayer(base, half_life_days=30)
    day = 86400.0
    layer.learn("zorbing", when=1_000_000.0)
    c0 = layer.count("zorbing")
    layer.learn("other words", when=1_000_000.0 + 30 * day)
    assert layer.count("zorbing") == pytest.approx(c0 / 2, rel=1e-12)
    layer.learn("late but earlier timestamp", when=1_000_000.0)  # clocks going back never add weight
    assert layer.count("zorbing") == pytest.approx(c0 / 2, rel=1e-12)


@settings(max_examples=150, deadline=None)
@given(
    st.lists(st.sampled_from(USER + ["the object is a list", "zanele asks", "a zorbing object"]), max_size=12),
    st.sampled_from([None, "the", "zanele", "a", "is", "<unk>"]),
    st.sampled_from(["", "z", "th", "a", "o", "zo"]),
    st.integers(1, 8),
    st.floats(1.0, 200.0),
)
def test_ranking_equals_scoring_every_word(base: nextword.Model, msgs: list[str], prev: str | None, prefix: str, k: int, strength: float) -> None:
    layer = PersonalLayer(base, strength=strength, min_uses=2)
    for m in msgs:
        layer.learn(m)
    assert layer.rank_keys(prev, prefix, k) == _brute(layer, prev, prefix, k)
    layer.block("the")
    layer.block("zorbing")
    assert layer.rank_keys(prev, prefix, k) == _brute(layer, prev, prefix, k)


def test_save_and_load_round_trip(base: nextword.Model, tmp_path: Path) -> None:
    layer = PersonalLayer(base, half_life_messages=50, blocklist=["secret"])
    for m in USER:
        layer.learn(m)
    path = tmp_path / "me.nwp"
    layer.save(path)
    data = path.read_bytes()
    assert b"zorbing trip is on" not in data and b"Ask Zanele" not in data  # counts only, no text
    back = PersonalLayer.load(base, path)
    for prev in [None, "the", "zanele"]:
        for w in ["zorbing", "the", "trip", "</s>"]:
            assert back.prob(w, prev) == pytest.approx(layer.prob(w, prev), rel=1e-12)
    assert back.blocklist == {"secret"}
    a, b = back.suggest("the zo", 3), layer.suggest("the zo", 3)
    assert [x.word for x in a] == [x.word for x in b]
    assert [x.prob for x in a] == pytest.approx([x.prob for x in b], rel=1e-12)  # counts are saved undecayed


def test_damaged_or_truncated_files_raise_and_are_kept(base: nextword.Model, tmp_path: Path) -> None:
    layer = PersonalLayer(base)
    layer.learn("the zorbing trip")
    path = tmp_path / "me.nwp"
    layer.save(path)
    good = path.read_bytes()
    for bad in (good[:-3], good[:10], good[:30] + bytes([good[30] ^ 0xFF]) + good[31:], b"hello" * 10):
        path.write_bytes(bad)
        with pytest.raises(ModelFormatError):
            PersonalLayer.load(base, path)
        assert path.read_bytes() == bad  # never silently replaced
    with pytest.raises(nextword.LayerNotFoundError, match="missing.nwp"):  # a missing file is not a damaged one
        PersonalLayer.load(base, tmp_path / "missing.nwp")


def test_memory_cap_evicts_least_useful_entries(base: nextword.Model) -> None:
    layer = PersonalLayer(base, max_entries=200, strength=5.0)
    for i in range(120):
        layer.learn(f"the zorbing trip number{i} with Zanele")
    assert layer.entries <= 200
    assert layer.count("zorbing") == 120  # frequent words and pairs survive eviction
    assert layer.pair_count("the", "zorbing") == 120
    outcomes = layer.vocabulary()
    for prev in [None, "the", "zorbing"]:
        assert math.fsum(layer.prob(w, prev) for w in outcomes) == pytest.approx(1.0, abs=1e-12)


def test_open_creates_saves_every_change_and_never_replaces_damage(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "me.nwp"
    layer = PersonalLayer.open(base, path, create=True, strength=5.0)
    assert path.exists()
    layer.learn("the zorbing trip")
    layer.learn("zorbing again")
    again = PersonalLayer.open(base, path)
    assert again.count("zorbing") == 2 and again.messages == 2
    again.forget("zorbing")
    assert PersonalLayer.load(base, path).count("zorbing") == 0  # forgetting reaches the file at once
    path.write_bytes(path.read_bytes()[:-1])
    with pytest.raises(ModelFormatError):
        PersonalLayer.open(base, path)
    assert path.stat().st_size > 0


def test_threads_learning_and_asking_never_see_a_torn_state(base: nextword.Model) -> None:
    import threading
    import time

    layer = PersonalLayer(base, strength=5.0, max_entries=500)
    outcomes_base = layer.vocabulary()
    errors: list[BaseException] = []
    stop = time.monotonic() + 3.0

    def writer() -> None:
        i = 0
        try:
            while time.monotonic() < stop:
                layer.learn(f"the zorbing trip {i % 37} with Zanele")
                if i % 25 == 0:
                    layer.forget("zanele")
                i += 1
        except BaseException as e:  # noqa: BLE001 - any failure fails the test
            errors.append(e)

    def reader() -> None:
        try:
            while time.monotonic() < stop:
                for text in ("", "the ", "the zo", "Za"):
                    layer.suggest(text, 3)
                with layer._lock:  # a consistent snapshot: the mixture sums to 1
                    outcomes = sorted(set(outcomes_base) | set(layer.vocabulary()))
                    total = math.fsum(layer.prob(w, "the") for w in outcomes)
                assert abs(total - 1.0) < 1e-9, total
        except BaseException as e:  # noqa: BLE001
            errors.append(e)

    threads = [threading.Thread(target=writer), threading.Thread(target=reader), threading.Thread(target=reader)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors, errors[0]
    assert layer.messages > 10


KILL_CHILD = r"""
import sys, nextword
from nextword.personal import PersonalLayer
base = nextword.load(sys.argv[1])
layer = PersonalLayer.open(base, sys.argv[2], create=True, strength=5.0)
i = layer.messages
while True:
    layer.learn(f"message number {i} about the zorbing trip")
    i += 1
    print(i, flush=True)
"""


def test_kill_minus_nine_loses_at_most_the_last_message(base: nextword.Model, tmp_path: Path) -> None:
    import os
    import random
    import signal
    import subprocess
    import sys
    import time

    root = Path(__file__).resolve().parent.parent
    path = tmp_path / "me.nwp"
    env = dict(os.environ, PYTHONPATH=str(root))
    rng = random.Random(11)
    for _ in range(8):
        proc = subprocess.Popen(
            [sys.executable, "-c", KILL_CHILD, base.path, str(path)], stdout=subprocess.PIPE, text=True, env=env
        )
        acknowledged = 0
        deadline = time.monotonic() + rng.uniform(0.6, 1.5)
        assert proc.stdout is not None
        while time.monotonic() < deadline:
            line = proc.stdout.readline()
            if not line:
                break
            acknowledged = int(line)
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        layer = PersonalLayer.load(base, path)  # always loads
        # every acknowledged message was saved; at most the one in flight is lost or kept
        assert acknowledged <= layer.messages <= acknowledged + 1 + sum(1 for _ in proc.stdout)
    assert layer.messages > 0


def test_personal_command_learns_forgets_and_survives(base: nextword.Model, tmp_path: Path) -> None:
    import json
    import os
    import subprocess
    import sys

    root = Path(__file__).resolve().parent.parent
    env = dict(os.environ, PYTHONPATH=str(root))
    layer = tmp_path / "me.nwp"

    def cli(*args: str) -> dict:
        r = subprocess.run([sys.executable, "-m", "nextword", "personal", str(layer), "--model", base.path, *args, "--json"],
                           capture_output=True, text=True, env=env)
        assert r.returncode == 0, r.stderr
        return json.loads(r.stdout)

    assert cli("learn", "ask Zanele about zorbing", "zorbing with Zanele")["messages"] == 2
    got = cli("suggest", "we went zo", "-k", "1")["results"][0]["suggestions"]
    assert [s["word"] for s in got] == ["zorbing"]
    cli("forget", "zorbing")
    assert cli("suggest", "we went zo")["results"][0]["suggestions"] == []
    assert cli("block", "zanele")["blocklist"] == ["zanele"]
    assert cli("info")["messages"] == 2  # a fresh process reads everything back
    layer.write_bytes(layer.read_bytes()[:-2])
    r = subprocess.run([sys.executable, "-m", "nextword", "personal", str(layer), "--model", base.path, "info"],
                       capture_output=True, text=True, env=env)
    assert r.returncode == 1 and "personal layer" in r.stderr and r.stderr.count("\n") == 1
