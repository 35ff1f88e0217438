"""ARPA export read back: every probability equals the model's and every history sums to 1."""

from __future__ import annotations

import gzip
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

import nextword
from nextword.export import write_arpa
from nextword.store import rewrite_model

ROOT = Path(__file__).resolve().parent.parent


def parse_arpa(text: str) -> tuple[dict[str, tuple[float, float | None]], dict[tuple[str, str], float], dict[int, int]]:
    """A small reader of the ARPA back-off format (the trade's standard layout, from memory)."""
    uni: dict[str, tuple[float, float | None]] = {}
    big: dict[tuple[str, str], float] = {}
    counts: dict[int, int] = {}
    section = None
    for line in text.splitlines():
        if not line.strip():
            continue
        if line.startswith("ngram "):
            order, num = line[6:].split("=")
            counts[int(order)] = int(num)
        elif line in ("\\data\\", "\\end\\"):
            section = None
        elif line.startswith("\\") and line.endswith("-grams:"):
            section = int(line[1])
        elif section == 1:
            parts = line.split("\t")
            uni[parts[1]] = (float(parts[0]), float(parts[2]) if len(parts) > 2 else None)
        elif section == 2:
            prob, words = line.split("\t")
            v, w = words.split(" ")
            big[(v, w)] = float(prob)
    return uni, big, counts


def backoff_prob(uni: dict, big: dict, v: str, w: str) -> float:
    # the ARPA rule: a listed pair's probability, else back-off weight × unigram (common practice)
    if (v, w) in big:
        return 10 ** big[(v, w)]
    return 10 ** (uni[v][1] or 0.0) * 10 ** uni[w][0]


@pytest.fixture(scope="module")
def model(tmp_path_factory: pytest.TempPathFactory) -> nextword.Model:
    from pydoc_data.topics import topics  # real English shipped with CPython

    lines = [ln for k in sorted(topics)[:20] for ln in topics[k].splitlines() if ln.strip()]
    path = tmp_path_factory.mktemp("arpa") / "m.nwm"
    nextword.train_texts(lines, path, min_count=2)
    return nextword.load(path)


@pytest.mark.parametrize("buckets", [False, True])
def test_arpa_round_trip(model: nextword.Model, tmp_path: Path, buckets: bool) -> None:
    m = model
    if buckets:
        path = tmp_path / "b.nwm"
        rewrite_model(model.path, path, lam=0.7, buckets={"bounds": [5, 50], "lambdas": [0.3, 0.6, 0.85]})
        m = nextword.load(path)
    out = tmp_path / "m.arpa.gz"
    write_arpa(m, out)
    uni, big, counts = parse_arpa(gzip.decompress(out.read_bytes()).decode("utf-8"))
    assert counts == {1: m.n_words + 3, 2: m.n_bigrams} and len(big) == m.n_bigrams and len(uni) == m.n_words + 3
    vocab = [k for k in uni if k not in ("<s>",)]
    histories = [k for k in uni if k != "</s>"]
    for (v, w), logp in big.items():
        prev = None if v == "<s>" else v
        assert 10**logp == pytest.approx(m.prob(w, prev), rel=1e-9)
    for v in histories:
        prev = None if v == "<s>" else v
        total = math.fsum(backoff_prob(uni, big, v, w) for w in vocab)
        assert total == pytest.approx(1.0, abs=1e-8)
        for w in vocab[:: max(1, len(vocab) // 50)]:  # unseen pairs too
            assert backoff_prob(uni, big, v, w) == pytest.approx(m.prob(w, prev), rel=1e-9)


def test_export_command(model: nextword.Model, tmp_path: Path) -> None:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    out = tmp_path / "m.arpa"
    r = subprocess.run([sys.executable, "-m", "nextword", "export", model.path, "--arpa", str(out)],
                       capture_output=True, text=True, env=env)
    assert r.returncode == 0, r.stderr
    text = out.read_text()
    assert text.startswith("\\data\\\nngram 1=") and text.rstrip().endswith("\\end\\")
