"""The personal layer over every base model: Jelinek-Mercer and Kneser-Ney, bigram and trigram.

Two invariants, checked by hypothesis on real English (``pydoc_data.topics``, shipped with
CPython) as the base corpus and random user histories:

* the mixture sums to 1 over the prediction vocabulary after every context (one- and
  two-word contexts, unseen words, ``<unk>``, sentence starts);
* ``suggest`` equals a brute-force oracle that shares only the text rules with the layer:
  it scores *every* word of the vocabulary that matches the typed prefix with
  ``prob_after`` and sorts by (mixture probability descending, base probability
  descending, key) — in every state: fresh, after learning, after forget, block and
  decay. Casing is checked against ``text.recase`` of the base's or the user's spelling.

Then the consumers: the service answers with the layer's own suggestions over a
Kneser-Ney trigram base, and ``nextword personal`` works over one.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path
from typing import Callable

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword.personal import PersonalLayer
from nextword.text import BOS, EOS, UNK, fold, parse_typed, recase

KINDS = [("jm", 2), ("kn", 2), ("jm", 3), ("kn", 3)]


@pytest.fixture(scope="module")
def bases(tmp_path_factory: pytest.TempPathFactory) -> dict[tuple[str, int], nextword.Model]:
    from pydoc_data.topics import topics  # real English shipped with CPython

    lines = [ln for k in sorted(topics)[:12] for ln in topics[k].splitlines() if ln.strip()]
    out = {}
    for smoothing, order in KINDS:
        path = tmp_path_factory.mktemp("b") / f"{smoothing}{order}.nwm"
        nextword.train_texts(lines, path, min_count=2, smoothing=smoothing, order=order)
        out[smoothing, order] = nextword.load(path)
    return out


USER = [
    "Ask Zanele about the zorbing trip",
    "the zorbing trip is on Friday",
    "Zanele booked the zorbing trip",
    "send the list to Zanele",
    "the object is a list of zorbing names",
    "a zorbing object, then the list again",
    "Return the value of the object",
    "the value is 42 and the zorb is new",
]
# words that start typed texts: base words, the user's new words, unseen ones, numbers
POOL = ["the", "a", "object", "list", "value", "is", "of", "zorbing", "Zanele", "trip", "return", "qqqx", "42", "The", "ZORBING"]
PREFIXES = ["", "t", "th", "z", "zo", "Zo", "ZO", "o", "v", "a", "l", "qq", "x", "R", "the"]


def _typed(draw_words: list[str], sep: str, prefix: str) -> str:
    return " ".join(draw_words) + sep + prefix


def _brute(layer: PersonalLayer, base: nextword.Model, typed: str, k: int) -> list[tuple[str, float]]:
    """The definition of the ranking: score every matching word of the vocabulary, sort."""
    ctx = parse_typed(typed)
    p = fold(ctx.prefix)
    rows = []
    for w in layer.vocabulary():
        if w in (EOS, UNK) or not w.startswith(p) or w in layer.blocklist:
            continue
        in_base = w in base
        if not in_base and layer.count(w) < layer.min_uses - 1e-9:  # a new word is offered once used min_uses times
            continue
        s = layer.prob_after(w, ctx.history)
        b = base.prob_after(w, ctx.history) if in_base else 0.0
        rows.append((-s, -b, w))
    rows.sort()
    return [(w, -s) for s, _, w in rows[:k]]


def _check_suggest(layer: PersonalLayer, base: nextword.Model, typed: str, k: int) -> None:
    got = layer.suggest(typed, k)
    want = _brute(layer, base, typed, k)
    assert [(fold(s.word), s.prob) for s in got] == want, typed
    ctx = parse_typed(typed)
    for s, (key, _) in zip(got, want):
        shown = base.spelling(key)
        if shown is not None:
            assert s.word == recase(shown, ctx.prefix, ctx.previous == BOS)
        else:
            assert fold(s.word) == key


@pytest.mark.parametrize("kind", KINDS, ids=[f"{s}{o}" for s, o in KINDS])
@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    msgs=st.lists(st.sampled_from(USER), max_size=10),
    strength=st.floats(0.5, 100.0),
    queries=st.lists(
        st.tuples(st.lists(st.sampled_from(POOL), max_size=3), st.sampled_from([" ", ". ", ", ", " 7 "]), st.sampled_from(PREFIXES), st.integers(1, 6)),
        min_size=1,
        max_size=4,
    ),
    ops=st.lists(st.sampled_from(["forget zorbing", "forget the", "block the", "block zanele", "block object", "unblock the"]), max_size=3),
    half_life=st.sampled_from([None, 2.0, 5.0]),
)
def test_suggest_equals_scoring_every_word(
    bases: dict[tuple[str, int], nextword.Model], kind: tuple[str, int], msgs: list[str], strength: float,
    queries: list[tuple[list[str], str, str, int]], ops: list[str], half_life: float | None,
) -> None:
    base = bases[kind]
    layer = PersonalLayer(base, strength=strength, min_uses=2, half_life_messages=half_life)
    for m in msgs:
        layer.learn(m)
    for words, sep, prefix, k in queries:
        _check_suggest(layer, base, _typed(words, sep, prefix), k)
    for op in ops:
        verb, word = op.split()
        getattr(layer, verb)(word)
    for words, sep, prefix, k in queries:
        _check_suggest(layer, base, _typed(words, sep, prefix), k)


@pytest.mark.parametrize("kind", KINDS, ids=[f"{s}{o}" for s, o in KINDS])
def test_suggest_equals_scoring_every_word_with_decay_and_a_long_history(bases: dict[tuple[str, int], nextword.Model], kind: tuple[str, int]) -> None:
    base = bases[kind]
    layer = PersonalLayer(base, strength=50.0, half_life_messages=7)
    lines = [ln for ln in (Path(nextword.__file__).parent / "personal.py").read_text().splitlines() if ln.strip().startswith("#")]
    texts = ["", "the ", "The o", "is a ", "return the v", "zo", "of the l", "A list of ", "Zanele booked the zo"]
    for i, m in enumerate(USER * 3 + lines[:60]):
        layer.learn(m)
        if i % 9 == 0:
            for t in texts:
                _check_suggest(layer, base, t, 1 + i % 5)
    assert layer.weight > 0.1


@pytest.mark.parametrize("kind", KINDS, ids=[f"{s}{o}" for s, o in KINDS])
@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(msgs=st.lists(st.sampled_from(USER), min_size=1, max_size=8), strength=st.floats(0.5, 100.0))
def test_mixture_sums_to_one_after_every_context(
    bases: dict[tuple[str, int], nextword.Model], kind: tuple[str, int], msgs: list[str], strength: float
) -> None:
    base = bases[kind]
    layer = PersonalLayer(base, strength=strength)
    for m in msgs:
        layer.learn(m)
    outcomes = layer.vocabulary()
    for history in [(None,), ("the",), ("the", "object"), ("zanele", "booked"), (BOS, "the"), ("is", "a"),
                    ("qqqx", "zorbing"), (UNK, "the"), ("the", UNK), ("return", "the"), ()]:
        total = math.fsum(layer.prob_after(w, history) for w in outcomes)
        assert total == pytest.approx(1.0, abs=1e-9), history
    # the one-token form is the same distribution as a one-token history
    assert layer.prob("zorbing", "the") == layer.prob_after("zorbing", ("the",))


def test_the_trigram_base_reads_two_words_and_the_user_part_one(bases: dict[tuple[str, int], nextword.Model]) -> None:
    base = bases["kn", 3]
    layer = PersonalLayer(base, strength=5.0)
    for m in USER:
        layer.learn(m)
    mu, n, lam = layer.weight, layer.tokens, layer.lam
    c_the = math.fsum(layer.pair_count("the", w) for w in layer.vocabulary())

    def user(w: str) -> float:  # λ·c(the, w)/c(the) + (1 − λ)·c(w)/N, the formula of the module docstring
        return lam * layer.pair_count("the", w) / c_the + (1 - lam) * layer.count(w) / n

    for history in [("of", "the"), ("is", "the"), (BOS, "the")]:
        for w in ["zorbing", "value", "object", "list"]:
            b = base.prob_after(w, history) if w in base else 0.0
            assert layer.prob_after(w, history) == pytest.approx((1 - mu) * b + mu * user(w), rel=1e-12), (history, w)
    # different two-word contexts give the base different distributions, and so the layer
    assert base.prob_after("value", ("of", "the")) != base.prob_after("value", ("is", "the"))
    assert layer.prob_after("value", ("of", "the")) != layer.prob_after("value", ("is", "the"))


def test_with_no_personal_data_the_layer_is_the_base(bases: dict[tuple[str, int], nextword.Model]) -> None:
    for kind in KINDS:
        base = bases[kind]
        layer = PersonalLayer(base)
        for t in ["", "the ", "The object is a ", "return the v", "Th", "qqq zz", "42 "]:
            assert layer.suggest(t, 5) == base.suggest(t, 5), (kind, t)


def test_service_answers_with_the_layer_over_a_kneser_ney_trigram_base(bases: dict[tuple[str, int], nextword.Model], tmp_path: Path) -> None:
    import shutil
    import socket
    import tempfile
    import threading

    from nextword.serve import ServeLimits, Server, listen_unix

    base = bases["kn", 3]
    mine = PersonalLayer(base)  # fed the same changes in this process: the oracle
    short = Path(tempfile.mkdtemp(prefix="nwp"))
    server = Server(base, listen_unix(short / "s.sock"), users_dir=tmp_path / "users", limits=ServeLimits())
    t = threading.Thread(target=server.serve_forever, daemon=True)
    t.start()
    try:
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        sock.settimeout(60)
        sock.connect(str(short / "s.sock"))
        f = sock.makefile("rb")

        def call(**req: object) -> dict:
            sock.sendall((json.dumps(req) + "\n").encode())
            answer = json.loads(f.readline())
            assert answer["ok"], answer
            return answer

        for m in USER:
            call(op="learn", user="ana", text=m)
            mine.learn(m)
        call(op="block", user="ana", word="object")
        mine.block("object")
        for q in ["", "the ", "the zo", "Zanele booked the ", "is a l", "The o"]:
            got = [(s["word"], s["prob"]) for s in call(op="suggest", user="ana", text=q, k=4)["suggestions"]]
            assert got == [(s.word, s.prob) for s in mine.suggest(q, 4)], q
            assert got != [] and "object" not in [fold(w) for w, _ in got]
        assert [s.word for s in mine.suggest("the zo", 1)] == ["zorbing"]
        f.close()
        sock.close()
    finally:
        server.stop()
        t.join(60)
        shutil.rmtree(short, ignore_errors=True)


def test_personal_command_over_a_kneser_ney_trigram_base(bases: dict[tuple[str, int], nextword.Model], tmp_path: Path) -> None:
    root = Path(__file__).resolve().parent.parent
    env = dict(os.environ, PYTHONPATH=str(root))
    base = bases["kn", 3]

    def cli(*args: str) -> dict:
        r = subprocess.run([sys.executable, "-m", "nextword", "personal", str(tmp_path / "me.nwp"), "--model", base.path, *args, "--json"],
                           capture_output=True, text=True, env=env)
        assert r.returncode == 0, r.stderr
        return json.loads(r.stdout)

    cli("learn", *USER)
    got = cli("suggest", "Zanele booked the zo", "-k", "2")["results"][0]["suggestions"]
    layer = PersonalLayer.load(base, tmp_path / "me.nwp")
    assert [(s["word"], s["prob"]) for s in got] == [(s.word, s.prob) for s in layer.suggest("Zanele booked the zo", 2)]
    assert got[0]["word"] == "zorbing"


def test_live_mode_over_a_kneser_ney_trigram_base(bases: dict[tuple[str, int], nextword.Model]) -> None:
    """``nextword live`` on a pseudo-terminal over a KN trigram file: the screen check of test_live
    (choice row = ``Model.suggest`` of the text left of the cursor, message, cursor, nothing else)."""
    if not sys.platform.startswith("linux"):
        pytest.skip("pseudo-terminal session: Linux only here")
    pytest.importorskip("pyte")
    from test_live import LiveSession, screen_check

    base = bases["kn", 3]
    live = LiveSession(Path(base.path), 80, 24, k=5)
    try:
        live.wait_for(screen_check(live, base, "", 0))
        text = ""
        for chunk in ["The object", " is a l", "ist of "]:
            live.send(chunk.encode())
            text += chunk
            live.wait_for(screen_check(live, base, text, len(text)))
        assert [s.word for s in base.suggest(text, 5)]  # the check compared real suggestions
        live.send(b"\x04")
        assert live.proc.wait(timeout=20) == 0
    finally:
        if live.proc.poll() is None:
            live.proc.kill()
        live.close()


def test_typing_box_over_a_kneser_ney_trigram_base(bases: dict[tuple[str, int], nextword.Model], tmp_path: Path) -> None:
    """The desktop example with a layer over a KN trigram base: the choice row is the layer's answer,
    Enter teaches the layer on disk (Xvfb, as test_gui)."""
    import shutil
    import textwrap

    if shutil.which("Xvfb") is None:
        pytest.skip("Xvfb is not installed (Debian package xvfb)")
    pytest.importorskip("tkinter")
    base = bases["kn", 3]
    script = textwrap.dedent(
        """
        import json, sys, tkinter as tk
        sys.path.insert(0, sys.argv[1])
        import importlib.util
        spec = importlib.util.spec_from_file_location("typing_box", sys.argv[1] + "/typing_box.py")
        tb = importlib.util.module_from_spec(spec); spec.loader.exec_module(tb)
        import nextword
        from nextword.personal import PersonalLayer
        model = nextword.load(sys.argv[2])
        layer = PersonalLayer.open(model, sys.argv[3], create=True, strength=1.0)
        root = tk.Tk()
        app = tb.TypingBox(root, model, layer=layer, k=3)
        out = {}
        def typed(text):
            app.text.focus_force()
            app.text.insert("end", text)
            app.text.event_generate("<KeyRelease>", keysym="a")
            root.update()
        root.update()
        out["start"] = [app.choice_words(), [s.word for s in layer.suggest("", 3)]]
        typed("Zanele booked the zorbing trip")
        app.text.event_generate("<Return>"); root.update()
        typed("Zanele booked the zo")
        out["after"] = [app.choice_words(), [s.word for s in layer.suggest("Zanele booked the zo", 3)]]
        out["messages"] = PersonalLayer.load(model, sys.argv[3]).messages
        print(json.dumps(out))
        root.destroy()
        """
    )
    root = Path(__file__).resolve().parent.parent
    r = subprocess.run(
        ["xvfb-run", "-a", sys.executable, "-c", script, str(root / "examples"), base.path, str(tmp_path / "me.nwp")],
        capture_output=True, text=True, timeout=120, env=dict(os.environ, PYTHONPATH=str(root)),
    )
    if r.returncode != 0 and "couldn't connect to display" in r.stderr:
        pytest.skip(f"no virtual display: {r.stderr.strip()[-200:]}")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout.strip().splitlines()[-1])
    assert out["start"][0] == out["start"][1] and out["start"][0]
    assert out["after"][0] == out["after"][1]
    assert out["messages"] == 1


@pytest.mark.parametrize("kind", KINDS, ids=[f"{s}{o}" for s, o in KINDS])
def test_model_accessors_the_layer_uses(bases: dict[tuple[str, int], nextword.Model], kind: tuple[str, int]) -> None:
    from nextword.errors import InvalidArgumentError

    base = bases[kind]
    words = [w for w, _ in base.words()][:40] + ["</s>", "<unk>", "qqqx", "The"]
    for history in [(None,), ("the",), ("of", "the"), ("qqqx", "is"), (UNK,), ()]:
        # one context read, many words: prob_after of each, to the last bit (also past the 8-word vector threshold)
        assert base.probs_after(words, history) == [base.prob_after(w, history) for w in words]
        assert base.probs_after(words[:3], history) == [base.prob_after(w, history) for w in words[:3]]
    assert base.spelling("THE") == base.spelling("the") is not None and fold(base.spelling("the") or "") == "the"
    assert base.spelling("qqqx") is None
    layer = PersonalLayer(base)
    bad_calls: list[Callable[[], object]] = [
        lambda: base.probs_after("the", ("a",)),
        lambda: base.probs_after([3], ("a",)),  # type: ignore[list-item]
        lambda: base.spelling(3),  # type: ignore[arg-type]
        lambda: layer.prob_after("the", "a"),
        lambda: layer.rank_after(("a",), 3, 3),  # type: ignore[arg-type]
        lambda: layer.suggest(3),  # type: ignore[arg-type]
        lambda: layer.suggest("a", 0),
    ]
    for bad in bad_calls:
        with pytest.raises(InvalidArgumentError):
            bad()
