"""The noisy typist (nextword.evaluate) and typo tolerance wired into eval, the personal layer and serve (issue 17).

References, named beside each check: the error-free keystroke simulation
(``simulate_message``, itself tested against hand-counted messages) for a typist without
slips; hand counts for a scripted typist; binomial bounds (common practice) for the slip
rates; brute force (every suggestible word scored by the layer's ``prob_after`` × its best
channel weight) for the personal layer.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword.errors import InvalidArgumentError
from nextword.evaluate import NoisyTypist, evaluate, simulate_message, simulate_noisy
from nextword.keyboard import Channel
from nextword.model import Suggestion
from nextword.personal import PersonalLayer
from nextword.text import EOS, UNK, fold, parse_typed


def _english() -> list[str]:
    from pydoc_data.topics import topics  # real English shipped with CPython

    return [ln for k in sorted(topics)[:12] for ln in topics[k].splitlines() if ln.strip()]


@pytest.fixture(scope="module")
def english_model(tmp_path_factory: pytest.TempPathFactory) -> tuple[nextword.Model, Path, list[str]]:
    lines = _english()
    held = lines[::10]
    train = [ln for i, ln in enumerate(lines) if i % 10]
    d = tmp_path_factory.mktemp("typo")
    (d / "held.txt").write_text("\n".join(held[:60]) + "\n")
    nextword.train_texts(train, d / "m.nwm", min_count=1)
    return nextword.load(d / "m.nwm"), d, held[:60]


def test_a_typist_without_slips_is_the_error_free_simulation(english_model: tuple[nextword.Model, Path, list[str]]) -> None:
    model, _, held = english_model

    def sug(t: str, k: int) -> list[Suggestion]:
        return model.suggest(t, k)

    for msg in held[:30]:
        # reference: the error-free simulation, for every k
        assert simulate_noisy(sug, msg, (1, 3, 5), NoisyTypist(seed=3)) == simulate_message(sug, msg, (1, 3, 5))


class _Scripted(NoisyTypist):
    """Taps from a script instead of the generator (for hand-counted runs)."""

    script: dict[str, str] = {}

    def taps(self, word: str, rng: np.random.Generator) -> str:
        return self.script.get(word, word)


def test_keystrokes_of_a_scripted_typist_by_hand() -> None:
    # a predictor that offers a word only once the typed letters are an exact prefix of it
    # and at least two letters are typed
    vocab = ["hello", "world"]

    def sug(typed: str, k: int) -> list[Suggestion]:
        p = parse_typed(typed).prefix
        return [Suggestion(w, 1.0) for w in vocab if len(p) >= 2 and w.startswith(p)][:k]

    _Scripted.script = {"hello": "hwllo", "world": "world"}
    st = simulate_noisy(sug, "hello world", (3,), _Scripted())[3]
    # "hello" typed as h-w-l-l-o, never offered: 5 taps, the word stays misspelt; the space: 1;
    # "world": w, o typed, offered at "wo": 2 + 1 tap; nothing follows. 5 + 1 + 3 = 9 of 11
    assert st.keystrokes == 9
    assert st.ksr == pytest.approx(1 - 9 / 11)
    assert (st.accepted, st.slipped, st.lost, st.words) == (1, 1, 1, 2)
    assert st.not_completed_rate == 0.5 and st.lost_rate == 0.5
    _Scripted.script = {"hello": "hel", "world": "wodld"}  # an omitted letter, then a late slip
    st = simulate_noisy(sug, "hello world", (3,), _Scripted())[3]
    # "hello": h, e typed, offered at "he": 2 + 1, and the space after it is free;
    # "world": offered at "wo" (the slip comes later): 2 + 1. Total 6 of 11
    assert st.keystrokes == 6
    assert (st.accepted, st.slipped, st.lost) == (2, 0, 0)


def test_slip_rates_and_seeds() -> None:
    word = "keyboards" * 200  # 1800 letters, all on the layout
    rng = np.random.default_rng(0)
    n = len(word)
    # substitutions only: same length, the changed share within 4 binomial σ of the rate (common practice)
    taps = NoisyTypist(substitution=0.2).taps(word, rng)
    assert len(taps) == n
    changed = sum(a != b for a, b in zip(taps, word))
    assert abs(changed / n - 0.2) < 4 * math.sqrt(0.2 * 0.8 / n)
    # omissions only: letters drop out at the rate
    taps = NoisyTypist(omission=0.1).taps(word, rng)
    assert abs((n - len(taps)) / n - 0.1) < 4 * math.sqrt(0.1 * 0.9 / n)
    # insertions only: extra taps at the rate; the intended letters are still there in order
    taps = NoisyTypist(insertion=0.1).taps(word, rng)
    assert abs((len(taps) - n) / n - 0.1) < 4 * math.sqrt(0.1 * 0.9 / n)
    # case and letters off the layout: capitals stay capitals, digits and apostrophes are typed right
    t = NoisyTypist(substitution=0.5)
    out = t.taps("DON'T-42" * 50, np.random.default_rng(1))
    assert all(c.isupper() or c in "'-42" for c in out)
    assert out.count("'") == 50 and out.count("4") == 50
    # seeded by (seed, message): the same slips every time, other seeds other slips
    a, b = NoisyTypist(substitution=0.3, seed=1), NoisyTypist(substitution=0.3, seed=2)
    msg = "the quick brown fox jumps over the lazy dog"
    assert a.taps(msg, a.rng(msg)) == a.taps(msg, a.rng(msg))
    assert a.taps(msg, a.rng(msg)) != b.taps(msg, b.rng(msg))
    for bad in ({"substitution": -0.1}, {"substitution": 0.6}, {"seed": -1}, {"substitution": 0.3, "omission": 0.3}):
        with pytest.raises(InvalidArgumentError):
            NoisyTypist(**bad)  # type: ignore[arg-type]


def test_tolerance_wins_back_words_a_slip_hides(english_model: tuple[nextword.Model, Path, list[str]]) -> None:
    model, _, held = english_model
    typist = NoisyTypist(substitution=0.1, seed=5)
    off, _ = evaluate(model, [("h", held)], (3,), typist=typist)
    on, _ = evaluate(model, [("h", held)], (3,), typist=typist, typo=Channel())
    # the same slips (seeded by the message): tolerance can only find more words here
    assert on.per_k[3].lost < off.per_k[3].lost
    assert on.per_k[3].ksr > off.per_k[3].ksr
    assert off.per_k[3].slipped > 0


def _run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "nextword", *args], capture_output=True, text=True)


def test_cli_eval_and_suggest_with_slips(english_model: tuple[nextword.Model, Path, list[str]]) -> None:
    model, d, held = english_model
    r = _run("eval", str(d / "m.nwm"), str(d / "held.txt"), "-k", "3", "--typo-rate", "0.05", "--typo-seed", "2",
             "--tolerate-typos", "--no-baselines", "--json")
    assert r.returncode == 0, r.stderr
    data = json.loads(r.stdout)
    assert data["typing"]["typist"]["substitution"] == 0.05
    # the command's figures are the library's, for the same typist and channel
    lib, _ = evaluate(model, [("h", held)], (3,), typist=NoisyTypist(substitution=0.05, seed=2), typo=Channel())
    row = data["overall"]["per_k"][0]
    assert row["ksr"] == lib.per_k[3].ksr and row["lost_words"] == lib.per_k[3].lost
    r = _run("eval", str(d / "m.nwm"), str(d / "held.txt"), "--typo-rate", "0.05", "--tolerate-typos", "--no-baselines")
    assert r.returncode == 0 and "words never offered" in r.stdout and "noisy typist" in r.stdout
    for bad in (["--typo-rate", "0.9"], ["--tolerate-typos", "--channel-rate", "0"], ["--tolerate-typos", "--layout", "nowhere"]):
        r = _run("eval", str(d / "m.nwm"), str(d / "held.txt"), "--no-baselines", *bad)
        assert r.returncode == 2 and r.stderr.startswith("nextword: error:") and r.stderr.count("\n") == 1, r.stderr
    r = _run("suggest", str(d / "m.nwm"), "--tolerate-typos", "--json", "the obkect")
    got = [s["word"] for s in json.loads(r.stdout)["results"][0]["suggestions"]]
    assert got == [s.word for s in model.suggest("the obkect", 3, typo=Channel())]
    assert "object" in got  # k is next to j on QWERTY


# -- the personal layer --------------------------------------------------------------------------

USER = ["Ask Zanele about the zorbing trip", "the zorbing trip is on Friday", "Zanele booked the zorbing trip"]


def _brute(layer: PersonalLayer, base: nextword.Model, typed: str, k: int, ch: Channel) -> list[tuple[str, float]]:
    """Every suggestible word scored by its best channel weight over the readings × the mixture."""
    ctx = parse_typed(typed)
    p = fold(ctx.prefix)
    readings = dict(base.typo_prefixes(ctx.prefix, ch))
    readings[p] = max(readings.get(p, 0.0), 1.0)
    rows = []
    for w in layer.vocabulary():
        if w in (EOS, UNK) or w in layer.blocklist:
            continue
        if w not in base and layer.count(w) < layer.min_uses - 1e-9:
            continue
        weight = max((v for q, v in readings.items() if w.startswith(q)), default=0.0)
        if weight > 0.0:
            rows.append((-(weight * layer.prob_after(w, ctx.history)), base.tie_rank(w), w))
    rows.sort()
    return [(w, -s) for s, _, w in rows[:k]]


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    msgs=st.lists(st.sampled_from(USER), max_size=6),
    words=st.lists(st.sampled_from(["the", "a", "zorbing", "object", "is", "of"]), max_size=2),
    prefix=st.sampled_from(["", "t", "yh", "zi", "zorv", "obj", "ibj", "rhe", "x", "qq"]),
    k=st.integers(1, 5),
)
def test_personal_layer_with_tolerance_is_the_brute_force(
    english_model: tuple[nextword.Model, Path, list[str]], msgs: list[str], words: list[str], prefix: str, k: int
) -> None:
    base = english_model[0]
    layer = PersonalLayer(base, strength=20.0, min_uses=1)
    for m in msgs:
        layer.learn(m)
    ch = Channel(substitution=0.05, omission=0.005, insertion=0.005, transposition=0.005, floor=1e-6)
    typed = " ".join(words) + " " + prefix
    got = [(fold(s.word), s.prob) for s in layer.suggest(typed, k, typo=ch)]
    want = _brute(layer, base, typed, k, ch)
    assert [s for _, s in got] == [s for _, s in want]
    assert [w for w, _ in got] == [w for w, _ in want] or len({s for _, s in want}) < len(want)  # ties aside


# -- serve ------------------------------------------------------------------------------------------


def test_serve_request_field(english_model: tuple[nextword.Model, Path, list[str]], tmp_path: Path) -> None:
    import socket

    from nextword.serve import Server

    model = english_model[0]
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as listener:
        listener.bind(("127.0.0.1", 0))
        server = Server(model, listener, users_dir=tmp_path)
        ans = server.handle_line(json.dumps({"op": "suggest", "text": "the obkect", "k": 3, "typos": True}).encode())
        assert ans is not None and ans["ok"], ans
        want = model.suggest("the obkect", 3, typo=Channel())
        assert [(s["word"], s["prob"]) for s in ans["suggestions"]] == [(s.word, s.prob) for s in want]
        ans = server.handle_line(json.dumps({"op": "suggest", "text": "the obkect", "typos": 0.01}).encode())
        assert ans is not None and ans["suggestions"] == [
            {"word": s.word, "prob": s.prob} for s in model.suggest("the obkect", 3, typo=Channel.from_rate(0.01))
        ]
        ans = server.handle_line(json.dumps({"op": "suggest", "text": "the obkect", "typos": False}).encode())
        assert ans is not None and ans["suggestions"] == []
        for bad in (0.7, "yes", -1, 0):
            ans = server.handle_line(json.dumps({"op": "suggest", "text": "x", "typos": bad}).encode())
            assert ans is not None and not ans["ok"] and ans["error"]["field"] == "typos", ans
