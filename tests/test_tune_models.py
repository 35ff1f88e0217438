"""`nextword tune` on model files of every kind: λ per order for the Jelinek-Mercer trigram,
a one-line refusal for Kneser-Ney.

Outside checks: the held-out optimum against a brute-force grid over (λ2, λ3) whose
per-token counts come from the plain-dict oracle ``DictJMTrigram`` (tests/test_model_trigram.py:
the textbook interpolation with dicts over the raw text, sharing only the text rules), and
the oracle's own ``prob`` at the chosen λ against the tuned file; the tuned file equals,
byte for byte, what ``train`` writes with those λ. Corpus: CPython's ``pydoc_data.topics``
(real English shipped with Python), split by ``evaluate.is_held_out``.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import nextword
from nextword.errors import InvalidArgumentError
from nextword.evaluate import is_held_out
from nextword.store import MAX_LAMBDA
from nextword.text import BOS, EOS, UNK, fold, sentences
from nextword.tune import check_tunable, tune_orders, write_lambdas
from test_model_trigram import DictJMTrigram

ROOT = Path(__file__).resolve().parent.parent
ENV = dict(os.environ, PYTHONPATH=str(ROOT))


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "nextword", *args], capture_output=True, text=True, env=ENV)


@pytest.fixture(scope="module")
def data(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    from pydoc_data.topics import topics

    lines = [ln for k in sorted(topics)[:30] for ln in topics[k].splitlines() if ln.strip()]
    train = [m for m in lines if not is_held_out(m, 20)]
    held = [m for m in lines if is_held_out(m, 20)]
    tmp = tmp_path_factory.mktemp("tune3")
    (tmp / "held.txt").write_text("\n".join(held) + "\n", encoding="utf-8")
    nextword.train_texts(train, tmp / "jm3.nwm", order=3, lam=0.9, lam3=0.9, min_count=2)
    nextword.train_texts(train, tmp / "kn3.nwm", order=3, smoothing="kn", min_count=2)
    nextword.train_texts(train, tmp / "kn2.nwm", order=2, smoothing="kn", min_count=2)
    return {"tmp": tmp, "train": train, "held": held}


def _token_columns(oracle: DictJMTrigram, held: list[str]) -> np.ndarray:
    """(b3, seen3, b2, seen2, u) per held-out token, from the oracle's dict counts (brute force)."""
    rows = oracle.rows
    known = set(oracle.vocab)
    out = []
    for m in held:
        for sent in sentences(m):
            toks = [UNK if t is None or fold(t) not in known else fold(t) for t in sent] + [EOS]
            hist = [BOS]
            for w in toks:
                u = rows[()].get(w, 0) / oracle.N
                r2 = rows.get((hist[-1],))
                b2, s2 = (r2.get(w, 0) / sum(r2.values()), 1.0) if r2 else (0.0, 0.0)
                r3 = rows.get(tuple(hist[-2:])) if len(hist) >= 2 else None
                b3, s3 = (r3.get(w, 0) / sum(r3.values()), 1.0) if r3 else (0.0, 0.0)
                out.append((b3, s3, b2, s2, u))
                hist.append(w)
    return np.asarray(out)


def _grid_loglik(cols: np.ndarray, l2: np.ndarray, l3: np.ndarray) -> np.ndarray:
    """Σ ln P over the tokens for every (λ2, λ3) of a grid (the textbook formula, DictJMTrigram.prob_key's)."""
    b3, s3, b2, s2, u = (cols[:, i][:, None, None] for i in range(5))
    p2 = np.where(s2 > 0, l2 * b2 + (1 - l2) * u, u)
    p3 = np.where(s3 > 0, l3 * b3 + (1 - l3) * p2, p2)
    return np.log(p3).sum(axis=0)


def test_optimum_beats_a_brute_force_grid_of_the_dict_oracle(data: dict[str, object]) -> None:
    tmp, train, held = Path(str(data["tmp"])), list(data["train"]), list(data["held"])  # type: ignore[call-overload]
    model = nextword.load(tmp / "jm3.nwm")
    t = tune_orders(model, held)
    oracle = DictJMTrigram(train, lam2=0.9, lam3=0.9, min_count=2)
    cols = _token_columns(oracle, held)
    cols = cols[cols[:, 4] > 0]  # a word never seen in training has P = 0 for every λ (left out by tune too)
    grid = np.round(np.arange(0.0, MAX_LAMBDA + 1e-9, 0.01), 2)
    L = _grid_loglik(cols, grid[:, None], grid[None, :])
    i, j = np.unravel_index(int(np.argmax(L)), L.shape)
    at_opt = float(_grid_loglik(cols, np.asarray([[t.lambdas[0]]]), np.asarray([[t.lambdas[1]]]))[0, 0])
    # the optimum is at least as good as every grid point, and next to the best one (concave likelihood)
    assert at_opt >= float(L.max()) - 1e-9
    assert abs(t.lambdas[0] - grid[i]) <= 0.01 + 1e-9 and abs(t.lambdas[1] - grid[j]) <= 0.01 + 1e-9
    # the tuned perplexity is the oracle's at those λ (all tokens: the unseen-word ones are P(<unk>) > 0 here)
    tuned = DictJMTrigram(train, lam2=t.lambdas[0], lam3=t.lambdas[1], min_count=2)
    logs = []
    for m in held:
        for sent in sentences(m):
            hist: list[str] = [BOS]
            for w in [UNK if tok is None else tok for tok in sent] + [EOS]:
                logs.append(math.log(tuned.prob(w, hist)))  # prob maps unknown words to <unk>, context too
                hist.append(w)
    assert math.exp(-math.fsum(logs) / len(logs)) == pytest.approx(t.perplexity, rel=1e-9)
    assert t.perplexity <= t.stored_perplexity
    # every point of each order's curve is no better than the optimum
    for curve in t.curves.values():
        assert min(curve.values()) >= t.perplexity * (1 - 1e-12)


def test_cli_writes_the_file_train_would_write(data: dict[str, object], tmp_path: Path) -> None:
    tmp, train = Path(str(data["tmp"])), list(data["train"])  # type: ignore[call-overload]
    r = _cli("tune", str(tmp / "jm3.nwm"), str(tmp / "held.txt"), "-o", str(tmp_path / "t.nwm"), "--no-ksr-curve", "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    lams = out["chosen_lambdas"]
    assert lams == out["perplexity_optimal_lambdas"] and out["order"] == 3 and out["stored_lambdas"] == [0.9, 0.9]
    assert lams == tune_orders(nextword.load(tmp / "jm3.nwm"), list(data["held"])).lambdas  # type: ignore[call-overload]
    tuned = nextword.load(tmp_path / "t.nwm")
    assert tuned.query_lambdas() == lams and tuned.header()["lambda3"] == lams[1]
    # byte for byte what train writes with these λ on the same text
    nextword.train_texts(train, tmp_path / "direct.nwm", order=3, lam=lams[0], lam3=lams[1], min_count=2)
    assert (tmp_path / "t.nwm").read_bytes() == (tmp_path / "direct.nwm").read_bytes()
    assert out["after"]["perplexity"] < out["before"]["perplexity"]


def test_cli_buckets_are_reported_not_stored(data: dict[str, object], tmp_path: Path) -> None:
    tmp = Path(str(data["tmp"]))
    r = _cli("tune", str(tmp / "jm3.nwm"), str(tmp / "held.txt"), "--buckets", "--min-bucket-events", "200",
             "--no-ksr-curve", "-o", str(tmp_path / "b.nwm"), "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    b = out["buckets"]
    assert b["stored"] is False and any("not stored" in n for n in out["notes"])
    assert len(b["lambdas"]) == 2 and all(len(v) == len(bd) + 1 for v, bd in zip(b["lambdas"], b["bounds"]))
    # buckets start from the single λ per order and only climb (tune.fit_order_buckets)
    assert b["tune_perplexity"] <= out["tune_perplexity"]["optimal"] * (1 + 1e-12)
    m = nextword.load(tmp_path / "b.nwm")
    assert m.query_lambdas() == out["chosen_lambdas"] and "lambda_buckets" not in m.header()


def test_cli_keystrokes_one_lambda_for_both_orders(data: dict[str, object], tmp_path: Path) -> None:
    tmp = Path(str(data["tmp"]))
    held = tmp_path / "few.txt"
    held.write_text("\n".join(list(data["held"])[:40]) + "\n", encoding="utf-8")  # type: ignore[call-overload]
    r = _cli("tune", str(tmp / "jm3.nwm"), str(held), "--objective", "keystrokes", "--json", "--report", str(tmp_path / "rep"))
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    best = out["keystroke_optimal_lambda"]
    assert out["chosen_lambdas"] == [best, best]
    curve = {row["lambda"]: row["ksr"] for row in out["ksr_curve"]}
    assert curve[best] == max(curve.values())
    # the search's KSR at the chosen λ is the simulation's on a model loaded with that λ
    from nextword.evaluate import evaluate

    msgs = [m for m in held.read_text(encoding="utf-8").splitlines() if m.strip()]
    o, _ = evaluate(nextword.load(tmp / "jm3.nwm", lam=best), [("h", msgs)], (3,))
    assert o.per_k[3].ksr == curve[best]
    assert (tmp_path / "rep" / "tune.md").read_text(encoding="utf-8").startswith("# λ tuning of")


@pytest.mark.parametrize("name", ["kn3.nwm", "kn2.nwm"])
def test_kneser_ney_is_refused_in_one_line(data: dict[str, object], tmp_path: Path, name: str) -> None:
    tmp = Path(str(data["tmp"]))
    r = _cli("tune", str(tmp / name), str(tmp / "held.txt"), "-o", str(tmp_path / "t.nwm"))
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "Kneser-Ney" in r.stderr and "discounts" in r.stderr, r.stderr
    assert not (tmp_path / "t.nwm").exists()
    with pytest.raises(InvalidArgumentError, match="Kneser-Ney"):
        check_tunable(nextword.load(tmp / name))


def test_write_lambdas_refuses_its_model_and_bigram_files(data: dict[str, object], tmp_path: Path) -> None:
    tmp = Path(str(data["tmp"]))
    model = nextword.load(tmp / "jm3.nwm")
    before = (tmp / "jm3.nwm").read_bytes()
    with pytest.raises(InvalidArgumentError, match="jm3.nwm"):
        write_lambdas(model, tmp / "jm3.nwm", [0.5, 0.5])
    assert (tmp / "jm3.nwm").read_bytes() == before
    nextword.train_texts(list(data["held"]), tmp_path / "b.nwm")  # type: ignore[call-overload]
    with pytest.raises(InvalidArgumentError, match="rewrite_model"):
        write_lambdas(nextword.load(tmp_path / "b.nwm"), tmp_path / "x.nwm", [0.5])


def test_pruned_trigram_totals_are_refused(data: dict[str, object], tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # totals above the sums of the stored counts (dropped mass of a pruned file): held-out events over the
    # stored counts would not be the file's probabilities, and a rebuild would lose the mass
    import dataclasses

    model = nextword.load(Path(str(data["tmp"])) / "jm3.nwm")
    assert model.totals_are_sums()
    levels = model.stored_levels()
    bumped = levels[1].ctx_total.copy()
    bumped[-1] += 3
    monkeypatch.setattr(model, "stored_levels", lambda: [levels[0], dataclasses.replace(levels[1], ctx_total=bumped), levels[2]])
    assert not model.totals_are_sums()
    for call in (lambda: tune_orders(model, list(data["held"])), lambda: write_lambdas(model, tmp_path / "t.nwm", [0.5, 0.5])):  # type: ignore[call-overload]
        with pytest.raises(InvalidArgumentError, match="before pruning"):
            call()
    assert not (tmp_path / "t.nwm").exists()
