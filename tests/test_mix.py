"""Mixtures of models (nextword.mix): probabilities, exact ranking, EM weights, the mixture file, the CLI.

Outside checks:
* each part's probability against the dict oracles (``baselines.DictBigram`` for a
  Jelinek-Mercer bigram, ``reference_kn.DictKneserNey`` for Kneser-Ney — both checked
  by hand and against nltk elsewhere), so P_mix = Σ w_i · P_i is checked against numbers
  computed without the engine;
* the EM weights against a direct maximisation of the held-out likelihood (golden-section
  search on the concave log-likelihood of a two-part mixture; the concavity of mixture
  likelihoods in the weights is common practice, e.g. Jelinek & Mercer 1980), and against
  the fixed-point condition of a maximum (mean responsibility = weight);
* the ranking against scoring every union word (brute force, hypothesis).
"""

from __future__ import annotations

import json
import math
import os
import random
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword.baselines import DictBigram
from nextword.cli import main
from nextword.errors import InputDataError, InvalidArgumentError, ModelFormatError
from nextword.mix import MIX_MAGIC, MixedModel, fit_weights, is_mix_file, load_mix, open_any, read_mix, write_mix
from nextword.reference_kn import DictKneserNey
from nextword.text import EOS, UNK, fold

SETTINGS = settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])

# invented word lists for property tests (they check invariants, not the estimate)
DOMAIN = ["ferry", "deck", "ticket", "harbor", "the", "a", "to", "late", "pier", "ramp"]
GENERAL = ["the", "a", "to", "of", "and", "river", "bank", "harbor", "was", "late", "town"]
# (smoothing, order[, quantised value bits]): every estimator, order and codec can be a part
KINDS: list[tuple] = [("jm", 2), ("kn", 2), ("jm", 3), ("kn", 3), ("kn", 3, 4), ("jm", 2, 5)]


def _real_lines() -> list[str]:
    """Real English shipped with CPython (pydoc_data.topics), one line per message."""
    from pydoc_data.topics import topics

    return [ln for k in sorted(topics) for ln in topics[k].splitlines() if ln.strip()]


def _train(lines: list[str], path: Path, kind: tuple) -> nextword.Model:
    extra = {"quantize": kind[2]} if len(kind) > 2 else {}
    nextword.train_texts(lines, path, smoothing=kind[0], order=kind[1], min_count=1, **extra)
    return nextword.load(path)


corpus = st.lists(st.lists(st.integers(0, 9), min_size=1, max_size=7), min_size=2, max_size=14)


def _lines(rows: list[list[int]], words: list[str]) -> list[str]:
    return [" ".join(words[i % len(words)] for i in row) for row in rows]


def _brute(mix: MixedModel, history: tuple[str, ...], prefix: str, k: int) -> list[tuple[str, float]]:
    """Every union word with the prefix, scored from the parts' own probabilities, sorted (probability desc, key)."""
    scored = []
    for key in mix.union_keys():
        if not key.startswith(fold(prefix)):
            continue
        s = 0.0
        for part, w in zip(mix.parts, mix.weights):
            s += w * (part.prob_after(key, history) if key in part else 0.0)
        scored.append((-s, key))
    scored.sort()
    return [(key, -s) for s, key in scored[:k]]


@SETTINGS
@given(a=corpus, b=corpus, kinds=st.tuples(st.sampled_from(KINDS), st.sampled_from(KINDS)),
       w=st.floats(0.0, 1.0), seed=st.integers(0, 1000))
def test_every_context_sums_to_one_and_suggest_equals_brute_force(
    tmp_path: Path, a: list[list[int]], b: list[list[int]], kinds: tuple[tuple[str, int], ...], w: float, seed: int
) -> None:
    pa = _train(_lines(a, DOMAIN), tmp_path / f"a{seed}.nwm", kinds[0])
    pb = _train(_lines(b, GENERAL), tmp_path / f"b{seed}.nwm", kinds[1])
    mix = MixedModel([pa, pb], [w, 1.0 - w])
    rng = random.Random(seed)
    words = sorted(set(DOMAIN + GENERAL))
    contexts = [("<s>",), ("<unk>",)] + [(rng.choice(words), rng.choice(words)) for _ in range(3)] + [("<s>", rng.choice(words))]
    outcomes = mix.union_keys() + [EOS, UNK]
    for h in contexts:
        probs = mix.probs_after(outcomes, h)
        assert math.fsum(probs) == pytest.approx(1.0, abs=1e-12), (h, kinds)
        assert all(p >= 0.0 for p in probs)
        # one at a time, bit for bit the same
        assert [mix.prob_after(x, h) for x in outcomes] == probs
        for prefix in ("", "t", "h", "ha", "zz"):
            for k in (1, 3, 8):
                assert mix.rank_after(h, prefix, k) == _brute(mix, h, prefix, k), (h, prefix, k, kinds)


def test_probabilities_against_the_dict_oracles(tmp_path: Path) -> None:
    """P_mix = w·P_JM-bigram + (1 − w)·P_KN-trigram with both parts from the dict oracles (no engine code)."""
    lines = _real_lines()
    dom, gen, held = lines[:1500], lines[1500:5000], lines[5000:5200]
    jm = _train(dom, tmp_path / "d.nwm", ("jm", 2))
    kn = _train(gen, tmp_path / "g.nwm", ("kn", 3))
    mix = MixedModel([jm, kn], [0.3, 0.7])
    o_jm = DictBigram(dom, min_count=1)
    o_kn = DictKneserNey(gen, order=3, min_count=1)
    checked = 0
    for line in held[:40]:
        words = [fold(t) for t in line.split() if t.isalpha()]
        for i in range(1, len(words)):
            h = ("<s>", words[i - 1]) if i == 1 else (words[i - 2], words[i - 1])
            w = words[i]
            if w not in mix:
                continue
            p_jm = o_jm.prob(w, h[-1], jm.lam) if w in jm else 0.0
            p_kn = o_kn.prob_key(w, o_kn._context(list(h))) if w in kn else 0.0
            want = 0.3 * p_jm + 0.7 * p_kn
            assert mix.prob_after(w, h) == pytest.approx(want, rel=1e-12), (h, w)
            checked += 1
    assert checked > 100


def test_em_weights_maximise_the_held_out_likelihood(tmp_path: Path) -> None:
    lines = _real_lines()
    a = _train(lines[:3000], tmp_path / "a.nwm", ("jm", 2))
    b = _train(lines[3000:8000], tmp_path / "b.nwm", ("kn", 3))
    held = lines[8000:8400]
    fit = fit_weights([a, b], held)
    probs = MixedModel([a, b], [0.5, 0.5]).token_probs(held)
    probs = probs[probs.sum(axis=1) > 0]

    def ll(x: float) -> float:
        with np.errstate(divide="ignore"):  # a weight of 0 gives a word only one part has log 0 = -inf
            return float(np.log(probs @ np.array([x, 1.0 - x])).sum())

    lo, hi = 0.0, 1.0  # golden-section search: the likelihood is concave in the weight
    g = (math.sqrt(5) - 1) / 2
    for _ in range(100):
        m1, m2 = hi - g * (hi - lo), lo + g * (hi - lo)
        if ll(m1) < ll(m2):
            lo = m1
        else:
            hi = m2
    assert fit.weights[0] == pytest.approx((lo + hi) / 2, abs=1e-4)
    assert fit.log_likelihood >= ll((lo + hi) / 2) - 1e-6
    # at the optimum each weight equals its mean responsibility (the EM fixed point)
    w = np.array(fit.weights)
    resp = (probs * w) / (probs @ w)[:, None]
    assert resp.mean(axis=0) == pytest.approx(w, abs=1e-6)
    # and the mixture is no worse than either part alone on the text it was fitted on
    assert fit.log_likelihood >= max(ll(0.0), ll(1.0))
    assert fit.perplexity == pytest.approx(MixedModel([a, b], fit.weights).perplexity(held), rel=1e-9)


def test_held_out_text_without_a_known_word_is_refused(tmp_path: Path) -> None:
    a = _train(["the ferry was late", "the deck is wet"], tmp_path / "a.nwm", ("jm", 2))
    b = _train(["the river bank", "a town by the river"], tmp_path / "b.nwm", ("kn", 2))
    with pytest.raises(InputDataError, match="no in-vocabulary word"):
        fit_weights([a, b], ["zebra quokka", "42 + 7"])


@pytest.mark.parametrize(
    "weights, message",
    [
        ([0.5, 0.6], r"must sum to 1, got 0\.5 \+ 0\.6"),
        ([-0.2, 1.2], r"must not be negative, got -0\.2"),
        ([1.0], r"1 weights given for 2 parts"),
        ([float("nan"), 1.0], r"finite number, got nan"),
        (["a", 1.0], r"finite number, got 'a'"),
    ],
)
def test_bad_weights_name_the_value(tmp_path: Path, weights: list[object], message: str) -> None:
    a = _train(["the ferry was late"], tmp_path / "a.nwm", ("jm", 2))
    b = _train(["the river bank"], tmp_path / "b.nwm", ("jm", 2))
    with pytest.raises(InvalidArgumentError, match=message):
        MixedModel([a, b], weights)  # type: ignore[arg-type]


def test_parts_counted_under_different_text_rules_are_refused(tmp_path: Path) -> None:
    a = _train(["the ferry was late"], tmp_path / "a.nwm", ("jm", 2))
    b = _train(["the river bank"], tmp_path / "b.nwm", ("jm", 2))
    b.text_rules = 2  # as a file from a later nextword would say (the loader itself refuses such files, below)
    with pytest.raises(InvalidArgumentError, match=r"different text rules: .*a\.nwm \(version 1\), .*b\.nwm \(version 2\)"):
        MixedModel([a, b], [0.5, 0.5])


def test_a_file_with_newer_text_rules_is_refused_naming_the_version(tmp_path: Path) -> None:
    from test_dropped_mass import _with_meta

    path = tmp_path / "a.nwm"
    nextword.train_texts(["the ferry was late", "the deck"] * 3, path, min_count=1)
    data = path.read_bytes()

    def rewritten(change: dict[str, object]) -> bytes:
        # make room for the new field: the corpus statistics shrink to one padded entry
        for n in range(0, 1000, 16):
            try:
                return _with_meta(data, {**change, "stats": {"p": "x" * n}})
            except AssertionError:
                continue
        raise AssertionError("no room in META")

    bad = tmp_path / "new.nwm"
    bad.write_bytes(rewritten({"text_rules": 2}))
    with pytest.raises(ModelFormatError, match="text rules version 2; this nextword has version 1"):
        nextword.load(bad)
    bad.write_bytes(rewritten({"text_rules": "1"}))
    with pytest.raises(ModelFormatError, match="'text_rules' is invalid: '1'"):
        nextword.load(bad)


# -- the mixture file ------------------------------------------------------------------------------


@pytest.fixture()
def two(tmp_path: Path) -> tuple[Path, Path]:
    lines = _real_lines()
    nextword.train_texts(lines[:800], tmp_path / "a.nwm", min_count=1)
    nextword.train_texts(lines[800:2400], tmp_path / "b.nwm", min_count=1, order=3, smoothing="kn")
    return tmp_path / "a.nwm", tmp_path / "b.nwm"


def test_mixture_file_round_trip(two: tuple[Path, Path], tmp_path: Path) -> None:
    out = tmp_path / "sub" / "m.nwx"
    out.parent.mkdir()
    write_mix(out, list(two), [0.25, 0.75], fitted={"method": "given"})
    assert is_mix_file(out) and not is_mix_file(two[0])
    data = read_mix(out)
    assert data["weights"] == [0.25, 0.75] and data["fitted"] == {"method": "given"}
    assert [p["path"] for p in data["parts"]] == [os.path.normpath(str(p)) for p in two]
    assert json.loads(json.dumps(data["parts"]))  # plain data
    m = load_mix(out)
    direct = MixedModel([nextword.load(p) for p in two], [0.25, 0.75])
    for typed in ("the ", "Return the", "an obj", "x"):
        assert m.suggest(typed, 5) == direct.suggest(typed, 5)
    assert isinstance(open_any(out), MixedModel) and isinstance(open_any(two[0]), nextword.Model)
    # paths are relative to the mixture file: a copied folder works on its own copies
    dest = tmp_path / "copy"
    dest.mkdir()
    for p in two:
        (dest / p.name).write_bytes(p.read_bytes())
    write_mix(dest / "m.nwx", [dest / p.name for p in two], [0.5, 0.5])
    (dest / "a.nwm").write_bytes(b"")  # replaced after mixing: refused, naming the part
    with pytest.raises(ModelFormatError, match=r"part 0 .*a\.nwm.* has changed since mixing"):
        load_mix(dest / "m.nwx")
    (dest / "a.nwm").write_bytes(two[1].read_bytes()[: two[0].stat().st_size].ljust(two[0].stat().st_size, b"\0"))
    with pytest.raises(ModelFormatError, match="SHA-256 differs"):
        load_mix(dest / "m.nwx")
    os.unlink(dest / "a.nwm")
    with pytest.raises(InputDataError, match=r"part 0 .* is missing"):
        load_mix(dest / "m.nwx")


def test_hostile_mixture_files_raise(two: tuple[Path, Path], tmp_path: Path) -> None:
    good = tmp_path / "m.nwx"
    write_mix(good, list(two), [0.5, 0.5])
    raw = good.read_bytes()
    import msgpack

    body = msgpack.unpackb(raw[len(MIX_MAGIC):], raw=False)
    cases = {
        "bad magic": b"\x89NWY" + raw[4:],
        "truncated": raw[:20],
        "not msgpack": MIX_MAGIC + b"\xc1\xc1\xc1",
        "not a map": MIX_MAGIC + msgpack.packb([1, 2]),
        "newer major": MIX_MAGIC + msgpack.packb({**body, "version": [2, 0]}),
        "newer minor": MIX_MAGIC + msgpack.packb({**body, "version": [1, 9]}),
        "no parts": MIX_MAGIC + msgpack.packb({**body, "parts": []}),
        "too many parts": MIX_MAGIC + msgpack.packb({**body, "parts": body["parts"] * 5, "weights": [0.1] * 10}),
        "path not str": MIX_MAGIC + msgpack.packb({**body, "parts": [{**body["parts"][0], "path": 7}, body["parts"][1]]}),
        "bytes negative": MIX_MAGIC + msgpack.packb({**body, "parts": [{**body["parts"][0], "bytes": -1}, body["parts"][1]]}),
        "bad digest": MIX_MAGIC + msgpack.packb({**body, "parts": [{**body["parts"][0], "sha256": "zz"}, body["parts"][1]]}),
        "weights sum": MIX_MAGIC + msgpack.packb({**body, "weights": [0.5, 0.6]}),
        "weights negative": MIX_MAGIC + msgpack.packb({**body, "weights": [-0.5, 1.5]}),
        "weights count": MIX_MAGIC + msgpack.packb({**body, "weights": [1.0]}),
        "weights overflow": MIX_MAGIC + msgpack.packb({**body, "weights": [1e308, 1e308]}),
        "fitted not map": MIX_MAGIC + msgpack.packb({**body, "fitted": 3}),
    }
    for name, data in cases.items():
        bad = tmp_path / "bad.nwx"
        bad.write_bytes(data)
        if name == "bad magic":
            with pytest.raises(ModelFormatError):  # not a mixture: read as a model file, refused there
                open_any(bad)
            with pytest.raises(ModelFormatError, match="bad magic"):
                load_mix(bad)
            continue
        with pytest.raises(ModelFormatError):
            load_mix(bad)
    rng = random.Random(5)
    for _ in range(300):  # random damage: only the library's own errors, never a crash
        buf = bytearray(raw)
        for _ in range(rng.randint(1, 4)):
            buf[rng.randrange(len(MIX_MAGIC), len(buf))] = rng.randrange(256)
        bad = tmp_path / "fuzz.nwx"
        bad.write_bytes(bytes(buf[: rng.randint(len(MIX_MAGIC), len(buf))]))
        try:
            load_mix(bad).close()
        except (ModelFormatError, InputDataError):
            pass


# -- the command line --------------------------------------------------------------------------------


def test_cli_mix_fits_writes_and_every_command_reads_it(two: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    held = tmp_path / "held.txt"
    held.write_text("\n".join(_real_lines()[2400:2600]), encoding="utf-8")
    test = tmp_path / "test.txt"
    test.write_text("\n".join(_real_lines()[2600:2650]), encoding="utf-8")
    out = tmp_path / "m.nwx"
    assert main(["mix", str(two[0]), str(two[1]), "--heldout", str(held), "-o", str(out), "--json"]) == 0
    got = json.loads(capsys.readouterr().out)
    fit = fit_weights([nextword.load(p) for p in two], held.read_text(encoding="utf-8").splitlines())
    assert got["weights"] == pytest.approx(fit.weights, abs=1e-12)
    assert read_mix(out)["fitted"]["method"] == "em"
    assert main(["suggest", str(out), "the ", "--json"]) == 0
    sugg = json.loads(capsys.readouterr().out)["results"][0]["suggestions"]
    assert [s["word"] for s in sugg] == [s.word for s in load_mix(out).suggest("the ", 3)]
    assert main(["info", str(out), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["kind"] == "mixture" and len(info["parts"]) == 2
    assert main(["eval", str(out), str(test), "-k", "3", "--json"]) == 0
    ev = json.loads(capsys.readouterr().out)
    assert len(ev["baselines"]["parts"]) == 2
    mixed = load_mix(out)
    assert ev["overall"]["perplexity"] == pytest.approx(mixed.perplexity(test.read_text(encoding="utf-8").splitlines()), rel=1e-9)


@pytest.mark.parametrize(
    "extra, code, message",
    [
        (["--weights", "0.5", "0.6"], 2, "weights must sum to 1, got 0.5 + 0.6"),
        (["--weights", "-0.5", "1.5"], 2, "must not be negative, got -0.5"),
        (["--weights", "1"], 2, "1 weights given for 2 parts"),
        (["--heldout", "HELD_UNKNOWN"], 1, "no in-vocabulary word"),
    ],
)
def test_cli_mix_bad_input_is_one_line(
    two: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str], extra: list[str], code: int, message: str
) -> None:
    unknown = tmp_path / "unknown.txt"
    unknown.write_text("zqxj vbnm\nqwzx 42\n", encoding="utf-8")
    extra = [str(unknown) if x == "HELD_UNKNOWN" else x for x in extra]
    assert main(["mix", str(two[0]), str(two[1]), "-o", str(tmp_path / "m.nwx"), *extra]) == code
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and message in err and "Traceback" not in err
    assert not (tmp_path / "m.nwx").exists()


def test_cli_refuses_lambda_for_a_mixture(two: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "m.nwx"
    write_mix(out, list(two), [0.5, 0.5])
    assert main(["suggest", str(out), "--lam", "0.5", "the "]) == 2
    assert "lam=0.5 given for a mixture" in capsys.readouterr().err


# -- consumers: the personal layer, the service ---------------------------------------------------------


def test_personal_layer_over_a_mixture_equals_brute_force(two: tuple[Path, Path]) -> None:
    """The layer's exact ranking (tests/test_personal_models.py's brute force) over a mixture base."""
    from test_personal_models import USER, _check_suggest

    from nextword.personal import PersonalLayer

    mix = MixedModel([nextword.load(p) for p in two], [0.4, 0.6])
    fresh = PersonalLayer(mix)
    for t in ["", "the ", "The object is a ", "return the v", "Th", "qqq zz"]:
        assert fresh.suggest(t, 5) == mix.suggest(t, 5), t  # no personal data: the base's own answer
    layer = PersonalLayer(mix, strength=20.0)
    for m in USER:
        layer.learn(m)
    for t in ["", "the ", "the zo", "Zanele booked the ", "is a l", "The o", "return the v", "x"]:
        for k in (1, 3, 6):
            _check_suggest(layer, mix, t, k)  # type: ignore[arg-type]
    outcomes = layer.vocabulary()
    for history in [(None,), ("the",), ("the", "object"), ("zanele", "booked"), ("<unk>", "the")]:
        assert math.fsum(layer.prob_after(w, history) for w in outcomes) == pytest.approx(1.0, abs=1e-9), history


def test_service_answers_over_a_mixture(two: tuple[Path, Path], tmp_path: Path) -> None:
    import shutil
    import socket
    import tempfile
    import threading

    from nextword.serve import ServeLimits, Server, listen_unix

    out = tmp_path / "m.nwx"
    write_mix(out, list(two), [0.3, 0.7])
    mix = load_mix(out)
    short = Path(tempfile.mkdtemp(prefix="nwx"))
    server = Server(mix, listen_unix(short / "s.sock"), users_dir=None, limits=ServeLimits())
    t = threading.Thread(target=server.serve_forever, daemon=True)
    t.start()
    try:
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        sock.settimeout(60)
        sock.connect(str(short / "s.sock"))
        f = sock.makefile("rb")
        for q in ["", "the ", "Return the obj", "a list of "]:
            sock.sendall((json.dumps({"op": "suggest", "text": q, "k": 4}) + "\n").encode())
            answer = json.loads(f.readline())
            assert answer["ok"], answer
            assert [(s["word"], s["prob"]) for s in answer["suggestions"]] == [(s.word, s.prob) for s in mix.suggest(q, 4)]
        f.close()
        sock.close()
    finally:
        server.stop()
        t.join(60)
        shutil.rmtree(short, ignore_errors=True)


# -- export ---------------------------------------------------------------------------------------------


def test_arpa_export_of_a_mixture_is_exact_where_listed_and_sums_to_one(two: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Read back by the independent ARPA reader of tests/test_export_ngram.py (format from memory, shares no code)."""
    from test_export_ngram import _read

    out = tmp_path / "m.nwx"
    write_mix(out, list(two), [0.35, 0.65])
    mix = load_mix(out)
    assert main(["export", str(out), "-o", str(tmp_path / "m.arpa"), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["estimator"] == "mix"
    arpa = _read(tmp_path / "m.arpa")
    assert arpa.order == mix.order == 3
    assert arpa.counts[1] == mix.n_words + 3
    # every listed trigram: the mixture's own probability
    top = list(arpa.grams[3])
    rng = random.Random(1)
    for words in rng.sample(top, min(400, len(top))):
        if words[-1] == "<s>":
            continue
        h = tuple(None if t == "<s>" else t for t in words[:-1])
        assert arpa.prob(words[:-1], words[-1]) == pytest.approx(mix.prob_after(words[-1], h), rel=1e-9), words
    # sentence starts are bigram-level contexts in both: exact for every listed word
    for words in [w for w in arpa.grams[2] if w[0] == "<s>"][:200]:
        assert arpa.prob(words[:1], words[1]) == pytest.approx(mix.prob_after(words[1], (None,)), rel=1e-9), words
    outcomes = [*mix.union_keys(), EOS, UNK]
    contexts = [("<s>",), ("<unk>", "the"), ("the", "object"), ("of", "the")] + [w[:-1] for w in rng.sample(top, 20)]
    for h in contexts:
        assert math.fsum(arpa.prob(h, w) for w in outcomes) == pytest.approx(1.0, abs=1e-9), h


# -- tune and prune --------------------------------------------------------------------------------------


def test_cli_tune_refits_the_weights_by_em(two: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    held = tmp_path / "held.txt"
    held.write_text("\n".join(_real_lines()[2400:2700]), encoding="utf-8")
    out = tmp_path / "m.nwx"
    write_mix(out, list(two), [0.9, 0.1])
    assert main(["tune", str(out), str(held), "-o", str(tmp_path / "t.nwx"), "--json"]) == 0
    got = json.loads(capsys.readouterr().out)
    fit = fit_weights([nextword.load(p) for p in two], held.read_text(encoding="utf-8").splitlines())
    assert got["chosen_weights"] == pytest.approx(fit.weights, abs=1e-12)
    assert load_mix(tmp_path / "t.nwx").weights == pytest.approx(tuple(fit.weights), abs=1e-12)
    assert got["after"]["perplexity"] <= got["before"]["perplexity"]
    assert main(["tune", str(out), str(held), "--buckets"]) == 2
    assert "refits its weights" in capsys.readouterr().err


def test_cli_prune_fits_the_budget_and_stays_exact(two: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "m.nwx"
    write_mix(out, list(two), [0.4, 0.6])
    total = sum(p.stat().st_size for p in two)
    budget = int(total * 0.85)
    assert main(["prune", str(out), "--max-size", str(budget), "-o", str(tmp_path / "small.nwx"), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    written = [Path(p["path"]) for p in info["parts"]]
    assert sum(p.stat().st_size for p in written) + (tmp_path / "small.nwx").stat().st_size <= budget
    small = load_mix(tmp_path / "small.nwx")
    assert small.weights == (0.4, 0.6)
    for h in [("<s>",), ("the",), ("of", "the")]:
        outcomes = small.union_keys() + [EOS, UNK]
        assert math.fsum(small.probs_after(outcomes, h)) == pytest.approx(1.0, abs=1e-12)
        for prefix in ("", "t", "ob"):
            assert small.rank_after(h, prefix, 4) == _brute(small, h, prefix, 4)


def test_mixture_file_layout_as_documented(tmp_path: Path) -> None:
    """docs/FORMAT.md §13.2, read with msgpack alone (no nextword code reads the file here)."""
    import hashlib

    import msgpack

    lines = _real_lines()
    nextword.train_texts(lines[:300], tmp_path / "general.nwm", min_count=1)
    nextword.train_texts(lines[300:400], tmp_path / "ferry.nwm", min_count=1)
    write_mix(tmp_path / "ferry.nwx", [tmp_path / "general.nwm", tmp_path / "ferry.nwm"], [0.3, 0.7])
    raw = (tmp_path / "ferry.nwx").read_bytes()
    assert raw[:8] == bytes.fromhex("894e57580d0a1a0a")
    assert raw[8:9] == b"\x83" and raw[9:17] == bytes.fromhex("a776657273696f6e") and raw[17:20] == bytes.fromhex("920100")
    assert raw[20:26] == bytes.fromhex("a57061727473") and raw[26:27] == b"\x92"
    assert raw[27:45] == bytes.fromhex("83a470617468ab67656e6572616c2e6e776d")
    assert raw.endswith(bytes.fromhex("a7776569676874739" "2cb3fd3333333333333cb3fe6666666666666"))
    body = msgpack.unpackb(raw[8:], raw=False)
    assert list(body) == ["version", "parts", "weights"]
    for part in body["parts"]:
        data = (tmp_path / part["path"]).read_bytes()
        assert part["bytes"] == len(data) and part["sha256"] == hashlib.sha256(data).hexdigest()


# -- typo tolerance ---------------------------------------------------------------------------------------


def test_typo_tolerant_ranking_of_a_mixture_equals_brute_force(two: tuple[Path, Path]) -> None:
    """Channel weight × mixture probability, each word with its best reading (the rule of Model.suggest(typo=))."""
    from nextword.keyboard import Channel, load_layout

    typo = Channel.from_rate(0.05, load_layout("qwerty"))
    mix = MixedModel([nextword.load(p) for p in two], [0.45, 0.55])
    for h in [("<s>",), ("the",), ("of", "the"), ("return", "the")]:
        for typed in ["obk", "tge", "vakue", "lust", "x", "re"]:
            readings = mix.typo_prefixes(typed, typo)
            assert readings and all(w > 0 for _, w in readings)
            scored = []
            for key in mix.union_keys():
                ws = [w for r, w in readings if key.startswith(r)]
                if ws:
                    scored.append((-(max(ws) * mix.prob_after(key, h)), key))
            scored.sort()
            for k in (1, 3, 5):
                assert mix.rank_after(h, typed, k, typo=typo) == [(key, -s) for s, key in scored[:k]], (h, typed, k)
    got = mix.suggest("Return the vakue", 3, typo=typo)
    assert [fold(s.word) for s in got] == [w for w, _ in mix.rank_after(("return", "the"), "vakue", 3, typo=typo)]


def test_eval_of_a_mixture_with_a_noisy_typist(two: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    test = tmp_path / "test.txt"
    test.write_text("\n".join(_real_lines()[2600:2640]), encoding="utf-8")
    out = tmp_path / "m.nwx"
    write_mix(out, list(two), [0.5, 0.5])
    assert main(["eval", str(out), str(test), "-k", "3", "--typo-rate", "0.05", "--tolerate-typos", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["typing"]["typist"]["substitution"] == 0.05 and len(data["baselines"]["parts"]) == 2
