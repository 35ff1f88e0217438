"""Opening and closing a personal layer: explicit creation, close(), the context manager."""

from __future__ import annotations

import subprocess
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword import InputDataError, InvalidArgumentError, LayerNotFoundError
from nextword.personal import PersonalLayer


def test_open_without_create_refuses_a_missing_file_and_names_it(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "typo.nwp"
    with pytest.raises(LayerNotFoundError, match="typo.nwp"):
        PersonalLayer.open(base, path)
    assert not path.exists()  # nothing was created by accident
    assert issubclass(LayerNotFoundError, InputDataError)
    with PersonalLayer.open(base, path, create=True, min_uses=3) as layer:
        assert layer.min_uses == 3
    assert path.exists()
    with PersonalLayer.open(base, path) as again:  # now it exists: no create needed
        assert again.min_uses == 3


def test_close_is_idempotent_keeps_the_changes_and_refuses_more(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "me.nwp"
    layer = PersonalLayer.open(base, path, create=True, strength=5.0)
    layer.learn("the zorbing trip")
    layer.close()
    layer.close()  # idempotent
    assert layer.closed
    assert PersonalLayer.load(base, path).messages == 1  # persisted
    assert layer.count("zorbing") == 1  # reading still works
    for change in (lambda: layer.learn("more"), lambda: layer.forget("zorbing"), layer.clear,
                   lambda: layer.block("x"), lambda: layer.unblock("x")):
        with pytest.raises(InvalidArgumentError, match="closed"):
            change()
    assert PersonalLayer.load(base, path).messages == 1
    with pytest.raises(InvalidArgumentError, match="closed"):
        layer.save(path)  # over the shared file, without the lock, it would drop others' changes
    layer.save(tmp_path / "copy.nwp")  # a copy elsewhere is fine
    assert PersonalLayer.load(base, tmp_path / "copy.nwp").messages == 1


def test_context_manager_closes_even_on_error(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "me.nwp"
    with pytest.raises(RuntimeError):
        with PersonalLayer.open(base, path, create=True) as layer:
            layer.learn("zorbing")
            raise RuntimeError("boom")
    assert layer.closed
    assert PersonalLayer.load(base, path).messages == 1


def test_public_readers_never_see_a_dict_change_size_while_another_thread_learns(base: nextword.Model) -> None:
    import threading
    import time

    layer = PersonalLayer(base, strength=5.0, max_entries=400)
    errors: list[BaseException] = []
    calls = [0]
    stop = time.monotonic() + 1.5

    def writer() -> None:
        i = 0
        while time.monotonic() < stop:
            layer.learn(f"the zorbing trip {i} with Zanele number{i}")  # new words every time: dicts grow
            if i % 30 == 0:
                layer.forget("zanele")
            i += 1

    def reader() -> None:
        while time.monotonic() < stop:
            try:
                assert layer.entries >= 0
                assert "</s>" in layer.vocabulary()
                assert layer.tokens >= 0 and layer.count("zorbing") >= 0 and layer.pair_count("the", "zorbing") >= 0
                calls[0] += 1
            except BaseException as e:  # noqa: BLE001 - RuntimeError: dictionary changed size during iteration
                errors.append(e)
                return

    threads = [threading.Thread(target=writer), threading.Thread(target=reader), threading.Thread(target=reader)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors, errors[0]
    assert calls[0] > 10


def _cli(base: nextword.Model, layer: Path, *args: str) -> "subprocess.CompletedProcess[str]":
    import os
    import subprocess
    import sys

    root = Path(__file__).resolve().parent.parent
    return subprocess.run(
        [sys.executable, "-m", "nextword", "personal", str(layer), "--model", base.path, *args],
        capture_output=True, text=True, env=dict(os.environ, PYTHONPATH=str(root)),
    )


def test_cli_reading_a_missing_layer_fails_in_one_line_and_creates_nothing(base: nextword.Model, tmp_path: Path) -> None:
    layer = tmp_path / "typo.nwp"
    for action in (["info"], ["suggest", "the zo"], ["forget", "zorbing"], ["unblock", "x"], ["clear"]):
        r = _cli(base, layer, *action)
        assert r.returncode == 1, (action, r.stderr)
        assert r.stderr.startswith("nextword: error: ") and "typo.nwp" in r.stderr and r.stderr.count("\n") == 1
        assert list(tmp_path.iterdir()) == []  # no layer, journal or lock file appeared
    assert _cli(base, layer, "info", "--create", "--json").returncode == 0  # creating is explicit
    assert layer.exists()
    other = tmp_path / "new.nwp"
    assert _cli(base, other, "learn", "the zorbing trip").returncode == 0  # learning creates
    assert other.exists()


def test_unblock_of_a_word_that_is_not_blocked_says_so(base: nextword.Model, tmp_path: Path) -> None:
    import json

    layer = tmp_path / "me.nwp"
    assert _cli(base, layer, "block", "zanele").returncode == 0
    r = _cli(base, layer, "unblock", "zanele", "zorbing", "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["not_blocked"] == ["zorbing"] and out["blocklist"] == []
    assert "'zorbing' was not blocked" in r.stderr and r.stderr.count("\n") == 1
    with PersonalLayer.open(base, layer) as lib:  # the library answers with one bool
        assert lib.unblock("zorbing") is False
        lib.block("zorbing")
        assert lib.unblock("zorbing") is True


OPS = st.one_of(
    st.tuples(st.just("learn"), st.sampled_from([
        "Ask Zanele about the zorbing trip", "the zorbing trip is on Friday", "Zanele booked it. 7 bikes!",
        "Straße und STRASSE", "don’t forget the trip", "", "a", "x" * 300 + " long word",
    ])),
    st.tuples(st.sampled_from(["forget", "block", "unblock"]), st.sampled_from(["zanele", "Zorbing", "trip", "the", "bikes"])),
    st.tuples(st.just("clear"), st.just("")),
)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(OPS, max_size=14), st.sampled_from([None, 3.0]), st.sampled_from([16, 40, 65_536]))
def test_file_and_memory_agree_after_any_changes(
    base: nextword.Model, tmp_path_factory: pytest.TempPathFactory, ops: list[tuple[str, str]], half_life: float | None, cap: int
) -> None:
    import msgpack

    path = tmp_path_factory.mktemp("rt") / "me.nwp"
    memory = PersonalLayer(base, strength=3.0, half_life_messages=half_life, max_entries=cap)
    filed = PersonalLayer.open(base, path, create=True, strength=3.0, half_life_messages=half_life, max_entries=cap)
    for op, arg in ops:
        for layer in (memory, filed):
            if op == "learn":
                layer.learn(arg)
            elif op == "clear":
                layer.clear()
            else:
                getattr(layer, op)(arg)
    back = PersonalLayer.load(base, path)  # snapshot + journal replay
    filed.save(path)  # compaction
    compacted = PersonalLayer.load(base, path)
    raw = msgpack.unpackb(path.read_bytes()[24:], raw=False)  # the payload, as docs/FORMAT.md lays it out
    assert compacted.entries == len(raw["unigram"]) + sum(len(r) for r in raw["bigram"].values()) <= cap
    for other in (filed, back, compacted):
        assert other.messages == memory.messages and other.entries == memory.entries
        assert other.blocklist == memory.blocklist
        for w in ("zanele", "zorbing", "trip", "the", "strasse", "don't", "</s>", "<unk>"):
            assert other.count(w) == pytest.approx(memory.count(w), rel=1e-12, abs=1e-300)
        assert [w for w, _ in other.rank_keys("the", "", 5)] == [w for w, _ in memory.rank_keys("the", "", 5)]
    filed.close()
