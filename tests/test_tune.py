"""λ tuning: EM against closed forms and grids, buckets, and the tuned model file."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
from nextword.baselines import DictBigram
from nextword.store import rewrite_model
from nextword.tune import Events, em_lambda, events_of, fit_buckets, optimal_lambda, perplexity_at

ROOT = Path(__file__).resolve().parent.parent


def test_two_token_closed_form() -> None:
    # L(λ) = ln(λ b1 + (1-λ) u1) + ln(λ b2 + (1-λ) u2); with d_i = b_i - u_i, L'(λ) = 0 gives
    # d1 (λ d2 + u2) + d2 (λ d1 + u1) = 0  =>  λ* = -(d1 u2 + d2 u1) / (2 d1 d2)   (by hand)
    b = np.array([0.8, 0.05])
    u = np.array([0.1, 0.3])
    d1, d2 = b - u
    closed = -(d1 * u[1] + d2 * u[0]) / (2 * d1 * d2)
    assert 0 < closed < 1
    assert optimal_lambda(b, u) == pytest.approx(closed, abs=1e-8)
    lam, _ = em_lambda(b, u, iterations=5000)
    assert lam == pytest.approx(closed, abs=1e-6)


def test_em_fixed_point_equals_a_fine_grid_on_real_text(tmp_path: Path) -> None:
    from pydoc_data.topics import topics  # real English shipped with CPython

    lines = [ln for k in sorted(topics)[:40] for ln in topics[k].splitlines() if ln.strip()]
    path = tmp_path / "m.nwm"
    nextword.train_texts(lines[::2], path, min_count=1)
    model = nextword.load(path)
    ev = events_of(model, lines[1::2])
    b, u = ev.bu()
    grid = np.linspace(0.0, 1.0, 100_001)[:-1]
    ll = [float(np.log(g * b + (1 - g) * u).sum()) for g in grid[::100]]  # coarse pass
    coarse = grid[::100][int(np.argmax(ll))]
    fine = grid[(grid > coarse - 0.002) & (grid < coarse + 0.002)]
    best = fine[int(np.argmax([float(np.log(g * b + (1 - g) * u).sum()) for g in fine]))]
    lam = optimal_lambda(b, u)
    assert abs(lam - best) <= 1e-4  # the precision
    em, trace = em_lambda(b, u, iterations=2000)
    assert abs(em - lam) <= 1e-4
    # and the tuned perplexity is what the model itself computes with that λ
    assert perplexity_at(ev, lam) == pytest.approx(model.perplexity(lines[1::2], lam=lam), rel=1e-9)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.floats(0, 1), st.floats(1e-6, 1)), min_size=1, max_size=30), st.floats(0.01, 0.99))
def test_em_never_decreases_the_likelihood(pairs: list[tuple[float, float]], start: float) -> None:
    # a property of EM (Dempster, Laird & Rubin 1977)
    b = np.array([p[0] for p in pairs])
    u = np.array([p[1] for p in pairs])
    _, trace = em_lambda(b, u, start=start, iterations=50)
    assert all(y >= x - 1e-9 * max(1.0, abs(x)) for x, y in zip(trace, trace[1:]))


def _events() -> Events:
    rng = np.random.default_rng(3)
    cv = rng.integers(1, 5000, size=4000)
    cvw = rng.binomial(cv, 0.05)
    cw = rng.integers(1, 200, size=4000)
    return Events(cv, cvw, cw, 100_000)


def test_one_bucket_equals_the_single_lambda() -> None:
    ev = _events()
    one = fit_buckets(ev, min_events=10**9)
    assert one.bounds == [] and len(one.lambdas) == 1
    assert one.lambdas[0] == pytest.approx(optimal_lambda(*ev.bu()), abs=1e-9)
    many = fit_buckets(ev, min_events=300)
    assert len(many.lambdas) > 3 and all(n >= 300 for n in many.events)
    # separable likelihood: buckets can only help on the data they were fitted on
    assert perplexity_at(ev, many.lambdas, many.bounds) <= perplexity_at(ev, one.lambdas[0]) + 1e-9


@pytest.fixture(scope="module")
def bucketed(tmp_path_factory: pytest.TempPathFactory) -> tuple[nextword.Model, DictBigram, list[str]]:
    from pydoc_data.topics import topics

    lines = [ln for k in sorted(topics)[:25] for ln in topics[k].splitlines() if ln.strip()]
    d = tmp_path_factory.mktemp("tune")
    base = d / "base.nwm"
    nextword.train_texts(lines, base, min_count=1)
    tuned = d / "tuned.nwm"
    rewrite_model(base, tuned, lam=0.6, buckets={"bounds": [3, 20, 200], "lambdas": [0.2, 0.5, 0.7, 0.95]})
    return nextword.load(tuned, verify=True), DictBigram(lines, min_count=1), lines


def test_probabilities_sum_to_one_with_buckets(bucketed: tuple) -> None:
    model, _, _ = bucketed
    outcomes = [w for w, _ in model.words()] + ["</s>", "<unk>"]
    for prev in [None, "<unk>", "the", "is", "a", "object", "zebra"]:
        assert math.fsum(model.prob(w, prev) for w in outcomes) == pytest.approx(1.0, abs=1e-12)


def test_bucketed_ranking_equals_brute_force_with_each_historys_lambda(bucketed: tuple) -> None:
    model, oracle, _ = bucketed
    assert model.format_version == (1, 1)
    for prev in [None, "the", "is", "a", "of", "object", "method", "<unk>"]:
        lam = model.lam_for(model.history_count(prev))
        for prefix in ["", "a", "th", "ex"]:
            assert model.rank_ids(prev, prefix, 5) == oracle.rank(prev, prefix, 5, lam)
    # buckets pick λ by c(v): bounds [3, 20, 200]
    assert [model.lam_for(c) for c in (1, 2, 3, 19, 20, 199, 200, 10**6)] == [0.2, 0.2, 0.5, 0.5, 0.7, 0.7, 0.95, 0.95]
    # an explicit λ overrides the buckets
    assert model.prob("the", "of", lam=0.3) == pytest.approx(
        0.3 * model.bigram_count("of", "the") / model.history_count("of") + 0.7 * model.unigram_count("the") / model.total
    )


def test_tune_command_writes_a_new_model_and_leaves_the_input(tmp_path: Path) -> None:
    from pydoc_data.topics import topics

    lines = [ln for k in sorted(topics)[:40] for ln in topics[k].splitlines() if ln.strip()]
    base = tmp_path / "base.nwm"
    nextword.train_texts(lines[::3], base, min_count=1)
    held = tmp_path / "held.txt"
    held.write_text("\n".join(lines[1::3]) + "\n")
    before = base.read_bytes()
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    out = tmp_path / "tuned.nwm"
    r = subprocess.run(
        [sys.executable, "-m", "nextword", "tune", str(base), str(held), "--buckets", "--min-bucket-events", "200",
         "--test-percent", "30", "--no-ksr-curve", "-o", str(out), "--json"],
        capture_output=True, text=True, env=env,
    )
    assert r.returncode == 0, r.stderr
    res = json.loads(r.stdout)
    assert base.read_bytes() == before
    tuned = nextword.load(out, verify=True)
    assert tuned.stored_lam == pytest.approx(res["perplexity_optimal_lambda"])
    assert tuned.lambda_values == pytest.approx(res["buckets"]["lambdas"])
    assert "held out by hash (30%)" in res["held_out_use"]
    assert res["after"]["perplexity"] < res["before"]["perplexity"]
    same = subprocess.run(
        [sys.executable, "-m", "nextword", "tune", str(base), str(held), "--no-ksr-curve", "-o", str(base)],
        capture_output=True, text=True, env=env,
    )
    assert same.returncode == 2 and "new file, not over its input" in same.stderr
    assert base.read_bytes() == before


def test_keystroke_objective_reports_a_curve(tmp_path: Path) -> None:
    msgs = ["see you at the workshop", "see you at the ride", "thanks for the tubes"] * 5
    base = tmp_path / "m.nwm"
    nextword.train_texts(msgs, base, min_count=1)
    held = tmp_path / "h.txt"
    held.write_text("see you at the workshop\nthanks for the ride\n")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run(
        [sys.executable, "-m", "nextword", "tune", str(base), str(held), "--objective", "keystrokes", "-k", "1", "--json"],
        capture_output=True, text=True, env=env,
    )
    assert r.returncode == 0, r.stderr
    res = json.loads(r.stdout)
    curve = {row["lambda"]: row["ksr"] for row in res["ksr_curve"]}
    assert len(curve) >= 12 and res["chosen_lambda"] in curve
    assert curve[res["chosen_lambda"]] == max(curve.values())


# -- the cap on tuned λ (MAX_LAMBDA) ------------------------------------------------------------

from nextword.store import MAX_LAMBDA  # noqa: E402
from nextword.tune import keystroke_search  # noqa: E402


def test_optimum_beyond_the_cap_is_the_cap() -> None:
    # every held-out pair seen with b > u: L'(λ) = Σ (b−u)/(λb + (1−λ)u) > 0 on all of [0, 1],
    # so the unconstrained maximiser is λ = 1 (by hand); tuning must stop at the cap
    b = np.array([0.5, 0.9, 0.3])
    u = np.array([0.01, 0.02, 0.05])
    assert optimal_lambda(b, u) == MAX_LAMBDA
    lam, trace = em_lambda(b, u, iterations=5000)
    assert lam <= MAX_LAMBDA
    assert all(y >= x - 1e-12 for x, y in zip(trace, trace[1:]))  # capped EM still never decreases L


@settings(max_examples=40, deadline=None)
@given(
    st.lists(st.lists(st.sampled_from(["see", "you", "at", "the", "shop", "ride", "tubes", "thanks"]), min_size=1,
                      max_size=7).map(" ".join), min_size=2, max_size=12),
    st.integers(0, 3),
)
def test_a_tuned_model_never_gives_an_in_vocabulary_word_probability_zero(msgs: list[str], held_from: int) -> None:
    # held-out text taken from the training text makes every held-out pair seen, which pushed the
    # likelihood optimum to λ = 1 (and P = 0 for every unseen pair) before the cap
    import tempfile

    held = msgs[held_from % len(msgs):] or msgs
    with tempfile.TemporaryDirectory() as tmp:
        base = Path(tmp) / "base.nwm"
        nextword.train_texts(msgs, base, min_count=1)
        model = nextword.load(base)
        ev = events_of(model, held)
        b, u = ev.bu()
        if len(b) == 0:
            return
        buckets = fit_buckets(ev, min_events=1)
        single = optimal_lambda(b, u)
        best_k, curve = keystroke_search(model, held, k=1, coarse=(0.5, 0.99), refine_step=0.01)
        assert all(0.0 <= x <= MAX_LAMBDA for x in [single, best_k, *curve, *buckets.lambdas])
        out = Path(tmp) / "tuned.nwm"
        rewrite_model(base, out, lam=single, buckets=buckets.as_meta())
        tuned = nextword.load(out, verify=True)
        words = [w for w, _ in tuned.words()]
        for prev in [None, "<unk>", *words]:
            assert all(tuned.prob(w, prev) > 0.0 for w in words), prev
        assert math.isfinite(tuned.perplexity(held))
        tuned.close()
        model.close()


def test_demo_split_tuned_with_buckets_has_finite_perplexity(tmp_path: Path) -> None:
    # the reproduction: split the demo corpus 80/20, train, tune --buckets with --test-percent 30;
    # before the cap, buckets of frequent histories got λ = 1.0000 and "after" perplexity was inf
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    run = lambda *a: subprocess.run([sys.executable, "-m", "nextword", *a], capture_output=True, text=True, env=env)  # noqa: E731
    tr, te, m, out = (str(tmp_path / x) for x in ("tr.txt", "te.txt", "m.nwm", "b.nwm"))
    assert run("split", str(ROOT / "examples/data/demo_messages.txt"), "--test-percent", "20",
               "--train-out", tr, "--test-out", te).returncode == 0
    assert run("train", tr, "-o", m).returncode == 0
    r = run("tune", m, te, "--buckets", "--test-percent", "30", "--no-ksr-curve", "-o", out, "--json")
    assert r.returncode == 0, r.stderr
    res = json.loads(r.stdout)
    assert max(res["buckets"]["lambdas"]) <= MAX_LAMBDA
    assert math.isfinite(res["after"]["perplexity"])
    assert res["after"]["perplexity"] <= res["before"]["perplexity"] * 1.01


def test_stored_lambda_of_one_is_clamped_on_load_and_refused_on_write(tmp_path: Path) -> None:
    # a file written before the cap (λ = 1 stored) still loads, with λ clamped and flagged
    import msgpack

    from nextword.counts import CountBuilder
    from nextword.store import atomic_write, build_sections, encode_sections

    b = CountBuilder()
    b.add_texts(["see you at the shop", "see you at the ride"])
    sections = build_sections(b.tables(min_count=1), lam=0.9)
    meta = msgpack.unpackb(sections[0][2], raw=False)
    meta["lambda"] = 1.0
    meta["lambda_buckets"] = {"bounds": [2], "lambdas": [0.5, 1.0]}
    sections[0] = (b"META", None, msgpack.packb(meta, use_bin_type=True))
    old = tmp_path / "old.nwm"
    atomic_write(old, encode_sections(sections, minor=1))
    m = nextword.load(old, verify=True)
    assert m.lambda_clamped and m.stored_lam == MAX_LAMBDA and m.lambda_values == [0.5, MAX_LAMBDA]
    assert m.info()["lambda_clamped"] is True
    assert m.prob("ride", "shop") > 0.0  # never seen after "shop": (1 − 0.999)·c(ride)/N
    assert m.prob("ride", "shop", lam=1.0) == 0.0  # an explicit query λ is not capped
    with pytest.raises(nextword.InvalidArgumentError, match="at most 0.999"):
        nextword.train_texts(["see you"], tmp_path / "x.nwm", lam=1.0, min_count=1)
    with pytest.raises(nextword.InvalidArgumentError, match="stored λ must lie in"):
        rewrite_model(old, tmp_path / "y.nwm", lam=0.9, buckets={"bounds": [2], "lambdas": [0.5, 1.0]})
